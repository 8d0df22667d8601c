"""peekalign: find where a streaming CTC/attention recognizer loses words.

Forced alignment, trigger windows, reach, deletion diagnosis and linked views over
what the model already dumps.
"""

from __future__ import annotations

from .align import (
    Alignment,
    StateOccupancy,
    TokenRun,
    WordRun,
    align_tokens,
    find_spikes,
    forward_backward,
    greedy_decode,
    word_runs,
)
from .analysis import UtteranceAnalysis, analyze
from .clock import FrameClock
from .corpus import Scan, scan
from .decoder import Decoder, UtteranceDecoder, ctc_triggers, triggered_decode
from .diagnosis import DELETION_CODES, Diagnosis, diagnose_deletions
from .errors import (
    ErrorAlignment,
    ErrorTotals,
    align_chars,
    align_words,
    cer,
    emission_delay,
    error_totals,
    wer,
)
from .exceptions import (
    AlignmentError,
    BundleError,
    ParameterError,
    PeekalignError,
    PeekalignWarning,
)
from .io.bundle import BundleWriter
from .lm import ArpaLM
from .model import Bundle, Problem, Utterance, check_bundle, open_bundle, read_kaldi_utterances
from .redecoding import Redecode, redecode
from .search import SearchResult, SearchTrace, prefix_search
from .streaming import (
    Consistency,
    CutMass,
    LatencyBudget,
    Sweep,
    SweepRow,
    Windows,
    WordReach,
    attention_windows,
    cut_mass,
    latency_budget,
    sweep,
    token_windows,
    trigger_frames,
    window_consistency,
    word_reach,
)
from .vocab import Vocabulary, WordBoundary

__version__ = "0.1.0"


def peek(source, **options):
    """Open the Jupyter peek widget on a bundle, an utterance or an analysis.

    A lazy wrapper of :func:`peekalign.widgets.peek` (see there for the options):
    ipywidgets and bokeh are imported only when it is called.

    Examples
    --------
    >>> import peekalign
    >>> app = peekalign.peek(peekalign.open_bundle("bundle"))
    >>> type(app).__name__
    'Peek'
    """
    from .widgets import peek as _peek

    return _peek(source, **options)


__all__ = [
    "Alignment",
    "AlignmentError",
    "ArpaLM",
    "Bundle",
    "BundleError",
    "BundleWriter",
    "Consistency",
    "CutMass",
    "DELETION_CODES",
    "Decoder",
    "Diagnosis",
    "ErrorAlignment",
    "ErrorTotals",
    "FrameClock",
    "LatencyBudget",
    "ParameterError",
    "PeekalignError",
    "PeekalignWarning",
    "Problem",
    "Redecode",
    "Scan",
    "SearchResult",
    "SearchTrace",
    "StateOccupancy",
    "Sweep",
    "SweepRow",
    "TokenRun",
    "Utterance",
    "UtteranceAnalysis",
    "UtteranceDecoder",
    "Vocabulary",
    "Windows",
    "WordBoundary",
    "WordReach",
    "WordRun",
    "__version__",
    "align_chars",
    "align_tokens",
    "align_words",
    "analyze",
    "attention_windows",
    "cer",
    "check_bundle",
    "ctc_triggers",
    "cut_mass",
    "diagnose_deletions",
    "emission_delay",
    "error_totals",
    "find_spikes",
    "forward_backward",
    "greedy_decode",
    "latency_budget",
    "open_bundle",
    "peek",
    "prefix_search",
    "read_kaldi_utterances",
    "redecode",
    "scan",
    "sweep",
    "token_windows",
    "trigger_frames",
    "triggered_decode",
    "wer",
    "window_consistency",
    "word_reach",
    "word_runs",
]
