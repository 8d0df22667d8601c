"""One module per command-line command (see :mod:`peekalign.cli`)."""
