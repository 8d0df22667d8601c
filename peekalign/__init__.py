"""peekalign: find where a streaming CTC/attention recognizer loses words.

Forced alignment, trigger windows, coverage, deletion diagnosis and linked views over
what the model already dumps.
"""

from __future__ import annotations

from .align import (
    Alignment,
    SoftAlignment,
    TokenSegment,
    WordSpan,
    find_spikes,
    forced_align,
    forward_backward,
    greedy_decode,
    word_spans,
)
from .clock import FrameClock
from .exceptions import (
    AlignmentError,
    BundleError,
    ParameterError,
    PeekalignError,
    PeekalignWarning,
)
from .io.bundle import BundleWriter
from .lm import ArpaLM
from .model import Bundle, Problem, Utterance, check_bundle, open_bundle
from .search import SearchResult, SearchTrace, prefix_search
from .vocab import Vocabulary, WordBoundary

__version__ = "0.1.0"

__all__ = [
    "Alignment",
    "AlignmentError",
    "ArpaLM",
    "Bundle",
    "BundleError",
    "BundleWriter",
    "FrameClock",
    "ParameterError",
    "PeekalignError",
    "PeekalignWarning",
    "Problem",
    "SearchResult",
    "SearchTrace",
    "SoftAlignment",
    "TokenSegment",
    "Utterance",
    "Vocabulary",
    "WordBoundary",
    "WordSpan",
    "__version__",
    "check_bundle",
    "find_spikes",
    "forced_align",
    "forward_backward",
    "greedy_decode",
    "open_bundle",
    "prefix_search",
    "word_spans",
]
