"""Data shipped with peekalign: the demo bundles.

Two bundles v1 of the same 24 test utterances from a tiny streaming CTC/attention model
trained on synthetic tram-depot dispatch speech (built by ``fixtures/make``):

- ``"full"``: decoder cross-attention with the whole encoder output visible;
- ``"streaming"``: decoder cross-attention truncated at trigger frame + look-ahead.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from ..exceptions import BundleError, ParameterError, describe

__all__ = ["DEMO_KINDS", "demo_path"]

DEMO_KINDS = ("full", "streaming")


def demo_path(kind: str = "full") -> Path:
    """Folder of a shipped demo bundle.

    Parameters
    ----------
    kind : {"full", "streaming"}
        ``"full"``: attention computed with the full encoder context;
        ``"streaming"``: attention of decoder step u limited to encoder frames
        ``[0, n_u + lookahead]``.

    Returns
    -------
    pathlib.Path
        A bundle folder, ready for :func:`peekalign.open_bundle`.

    Examples
    --------
    >>> from peekalign.data import demo_path
    >>> (demo_path() / "bundle.json").is_file()
    True
    >>> demo_path("streaming").name
    'streaming'
    """
    if kind not in DEMO_KINDS:
        raise ParameterError(
            f"The 'kind' parameter of demo_path must be one of {DEMO_KINDS}. Got {kind!r} instead."
        )
    root = resources.files(__name__) / "demo" / kind
    if not isinstance(root, Path) or not (root / "bundle.json").is_file():
        raise BundleError(
            describe(
                f"no demo bundle at {str(root)!r}",
                "the package data peekalign/data/demo/" + kind,
                "reinstall peekalign from a complete source tree or wheel",
            )
        )
    return root
