"""Measured encoder look-ahead of a torch encoder (the ``[torch]`` extra).

Every streaming figure rests on how far the encoder looks ahead. ``bundle.json``
declares it (``layers x lookahead_per_layer``, or a chunk size); a non-causal
convolution or a mask off by one makes the real encoder look further, and the offline
"streaming" WER then beats the device's. :func:`measure_encoder_lookahead` measures it
by intervention: the input is changed only after feature frame ``c`` (fresh noise from
``c + 1`` on), the encoder runs again, and every encoder frame whose output moves
depends on input past ``c`` (DEVELOPERS.md, "Measured encoder look-ahead"). One run per
cut gives, for each encoder frame, the last input frame it depends on, hence its
measured look-ahead; with the encoder's layers named, the same runs give it after every
layer.

torch is imported inside the functions only: ``import peekalign`` never loads it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .clock import declared_lookahead
from .exceptions import ParameterError

__all__ = [
    "EncoderLookahead",
    "declared_lookahead",
    "demo_target",
    "measure_encoder_lookahead",
    "streamed_log_probs",
]

#: Output change (absolute, largest over the frame's features) that counts as moved:
#: any change. A masked future contributes exact zeros, so a frame that does not see it
#: keeps every bit; one that sees it only through a long chain of small weights may move
#: by less than 1e-6, which still counts.
DEFAULT_TOL = 0.0
#: The future input is replaced by noise of this many times the input's spread (larger
#: noise can saturate a softmax and hide a path).
NOISE_SCALE = 1.0


@dataclass(frozen=True, eq=False)
class EncoderLookahead:
    """Measured against declared look-ahead of every encoder frame.

    Attributes
    ----------
    measured : ndarray of int64, shape (T,)
        Frames past encoder frame ``i`` the last input it depends on lies (in encoder
        frames: ``ceil((reach - i * subsampling - front_end_frames) / subsampling)``).
    reach : ndarray of int64, shape (T,)
        Last input (feature) frame encoder frame ``i`` depends on (to the grid of
        ``subsampling`` frames the cuts use).
    censored : ndarray of bool, shape (T,)
        The reach is the input's last frame, or ``i + measured`` the last encoder
        frame: the look-ahead may be longer than measured (the input ends).
    declared : ndarray of int64, shape (T,), or None
    layer_names : tuple of str
    layer_measured : ndarray of int64, shape (K, T), or None
        The measured look-ahead after each named layer.
    declared_per_layer : int or None
    input_frames : int
    subsampling : int
    front_end_frames : int
    """

    measured: np.ndarray
    reach: np.ndarray
    censored: np.ndarray
    declared: np.ndarray | None
    layer_names: tuple
    layer_measured: np.ndarray | None
    declared_per_layer: int | None
    input_frames: int
    subsampling: int
    front_end_frames: int

    @property
    def excess(self) -> np.ndarray:
        """Measured minus declared look-ahead per frame (0 where censored and not above)."""
        if self.declared is None:
            raise ParameterError("no declared look-ahead to compare with: pass declared=")
        ex = self.measured - self.declared
        return np.where(self.censored & (ex < 0), 0, ex)

    @property
    def per_layer_increment(self) -> np.ndarray | None:
        """(K, T): look-ahead each named layer adds (after it minus before it)."""
        if self.layer_measured is None:
            return None
        prev = np.vstack([np.zeros((1, self.measured.size), np.int64), self.layer_measured[:-1]])
        return self.layer_measured - prev

    def right_context(self) -> np.ndarray:
        """The measured look-ahead as the bundle's optional per-frame array
        (``encoder_right_context``, int32, >= 0)."""
        return np.maximum(self.measured, 0).astype(np.int32)

    def leaks(self) -> list[str]:
        """The comparison in plain words, one line per run of frames that agree."""
        return _leak_lines(self)

    def __repr__(self) -> str:
        d = "-" if self.declared is None else int(np.sum(self.excess > 0))
        return (
            f"EncoderLookahead(frames={self.measured.size}, measured max="
            f"{int(self.measured.max()) if self.measured.size else 0}, frames above declared={d})"
        )


def _runs(keys: list) -> list[tuple[int, int]]:
    out, start = [], 0
    for i in range(1, len(keys) + 1):
        if i == len(keys) or keys[i] != keys[start]:
            out.append((start, i - 1))
            start = i
    return out


def _frames(a: int, b: int) -> tuple[str, str]:
    """The run of frames and its verb: ("frame 3", "sees") or ("frames 0-44", "each sees")."""
    return (f"frame {a}", "sees") if a == b else (f"frames {a}-{b}", "each sees")


def _count(n: int, what: str = "frame") -> str:
    return f"{n} {what}" if n == 1 else f"{n} {what}s"


def _span(x: np.ndarray, what: str = "frame") -> str:
    """ "3 frames", or "0-24 frames" over a run whose values differ."""
    lo, hi = int(x.min()), int(x.max())
    text = f"{lo}" if lo == hi else f"{lo}-{hi}"
    return f"{text} {what}{'' if lo == hi == 1 else 's'}" if what else text


def _more(n: int) -> str:
    return "more" if n > 0 else "fewer"


def _leak_lines(m: EncoderLookahead) -> list[str]:
    """Plain-words lines: runs of frames with the same excess (and per-layer excess),
    e.g. "frames 0-44: each sees 7 frames more than declared in every layer ..."."""
    if m.declared is None:
        keys = [None if c else int(x) for x, c in zip(m.measured, m.censored, strict=True)]
        return [
            _near_end(m, a, b)
            if keys[a] is None
            else "{}: {} {} ahead (nothing declared to compare with)".format(
                *_frames(a, b), _count(keys[a])
            )
            for a, b in _runs(keys)
        ]
    ex = m.excess
    inc = m.per_layer_increment
    per = m.declared_per_layer
    keys = []
    for i in range(ex.size):
        layer = None
        if inc is not None and per is not None and not m.censored[i]:
            layer = tuple(int(x) - per for x in inc[:, i])
        # the frames whose look-ahead runs past the input's end make one line
        keys.append((None, True, None) if m.censored[i] else (int(ex[i]), False, layer))
    return [_leak_line(m, a, b, *keys[a], per) for a, b in _runs(keys)]


def _near_end(m: EncoderLookahead, a: int, b: int) -> str:
    """Frames ``a..b``, whose look-ahead runs past the input's end: lower bounds."""
    text = (
        f"{_frames(a, b)[0]}: too near the end of the input to measure in full (at least "
        f"{_span(m.measured[a : b + 1])} ahead"
    )
    if m.declared is not None:
        text += f", {_span(m.declared[a : b + 1], '')} declared"
    return text + ")"


def _leak_line(m: EncoderLookahead, a: int, b: int, e, cens: bool, layer, per) -> str:
    """One run of frames ``a..b`` with excess ``e`` (and per-layer excess ``layer``)."""
    where, sees = _frames(a, b)
    if cens:
        return _near_end(m, a, b)
    run = slice(a, b + 1)  # a chunked encoder's declared look-ahead varies in a run
    if e == 0:
        return f"{where}: as declared ({_span(m.declared[run])} ahead)"
    figures = f"{_span(m.measured[run])} ahead, {_span(m.declared[run], '')} declared"
    if layer and len(set(layer)) == 1 and layer[0] != 0:
        k = layer[0]
        text = (
            f"{where}: {sees} {_count(abs(k))} {_more(k)} than declared in every layer "
            f"({per + k} per layer where {per} is declared), {abs(e)} {_more(e)} in all: "
            f"{figures}"
        )
    else:
        text = f"{where}: {sees} {_count(abs(e))} {_more(e)} than declared"
        if layer and any(layer):
            parts = ", ".join(
                f"{n}: {abs(x)} {_more(x)}" for n, x in zip(m.layer_names, layer, strict=True) if x
            )
            text += f" ({parts})"
        text += f": {figures}"
    return text


def _first_tensor(out):
    import torch

    if isinstance(out, torch.Tensor):
        return out
    if isinstance(out, (tuple, list)):
        for x in out:
            t = _first_tensor(x)
            if t is not None:
                return t
    return None


def _as_btd(t, T_hint: int | None = None):
    """(1, T, D) from (1, T, D), (T, 1, D) or (T, D) outputs."""
    t = t.detach()
    if t.dim() == 2:
        return t[None]
    if t.dim() == 3 and t.shape[0] != 1 and t.shape[1] == 1:
        return t.transpose(0, 1)
    return t


def _run(encoder, x, layers):
    """Encoder output and each named layer's output, as (T, D) float64 tensors."""
    import torch

    seen: list = []
    hooks = [
        m.register_forward_hook(lambda _m, _i, out, k=k: seen.append((k, _first_tensor(out))))
        for k, m in enumerate(layers)
    ]
    try:
        with torch.no_grad():
            out = _first_tensor(encoder(x))
    finally:
        for h in hooks:
            h.remove()
    if out is None:
        raise ParameterError("the encoder returned no tensor; return (1, T, D) outputs")
    per = {}
    for k, t in seen:  # a layer called twice keeps its last output
        per[k] = _as_btd(t)[0].double()
    return _as_btd(out)[0].double(), [per[k] for k in range(len(layers))]


def _float64_copy(encoder, layers: list):
    """A float64 copy of a torch module and the copies of its ``layers`` (found by
    name), or the originals when ``encoder`` is not a module."""
    import copy

    import torch

    if not isinstance(encoder, torch.nn.Module):
        return encoder, layers, torch.float32
    names = {id(m): n for n, m in encoder.named_modules()}
    missing = [k for k, m in enumerate(layers) if id(m) not in names]
    if missing:
        raise ParameterError(
            f"found layer {missing[0]} not inside the encoder module, expected the encoder's "
            "own submodules (e.g. list(model.encoder.layers))"
        )
    dup = copy.deepcopy(encoder).double().eval()
    table = dict(dup.named_modules())
    return dup, [table[names[id(m)]] for m in layers], torch.float64


def _cuts(T_in: int, s: int, f: int) -> list[int]:
    """Cut points ``c`` (input changed from ``c + 1`` on): with ``s`` input frames per
    encoder frame only the grid ``c + 1 = f + 1 + m s`` changes a look-ahead in whole
    encoder frames (``ceil((r - i s - f) / s)``), so one run in ``s`` is enough."""
    starts = {0} | {g for g in range(f + 1 - s * ((f + 1) // s), T_in, s) if g >= 1}
    return sorted(g - 1 for g in starts if g <= T_in - 1)


def _moved(base, other, tol: float) -> np.ndarray:
    d = (other - base).abs()
    return (d.reshape(d.shape[0], -1).max(dim=1).values > tol).numpy()


def _declared(declared, T: int):
    """Per-frame declared array and per-layer figure from the ``declared`` argument."""
    if declared is None:
        return None, None
    if isinstance(declared, tuple) and len(declared) == 2:
        layers, per = declared
        return declared_lookahead(T, layers=layers, per_layer=per), int(per)
    if isinstance(declared, dict):
        opts = {k: declared[k] for k in ("layers", "per_layer", "chunk") if k in declared}
        per = (
            int(declared["per_layer"])
            if "chunk" not in declared and "per_layer" in declared
            else None
        )
        return declared_lookahead(T, **opts), per
    if isinstance(declared, (int, np.integer)) and not isinstance(declared, bool):
        return np.full(T, int(declared), np.int64), None
    arr = np.asarray(declared)
    if arr.shape != (T,) or not np.issubdtype(arr.dtype, np.integer):
        raise ParameterError(
            "The 'declared' parameter of measure_encoder_lookahead must be an int, a "
            "(layers, per_layer) pair, a dict with layers/per_layer/chunk, or an int array of "
            f"one value per encoder frame ({T}). Got {declared!r} instead."
        )
    return arr.astype(np.int64), None


def measure_encoder_lookahead(
    encoder,
    features,
    *,
    declared=None,
    layers: Sequence | None = None,
    layer_names: Sequence[str] | None = None,
    subsampling: int = 1,
    front_end_frames: int = 0,
    tol: float = DEFAULT_TOL,
    seed: int = 0,
    double: bool = True,
) -> EncoderLookahead:
    """Measure each encoder frame's look-ahead by changing only the future input.

    Parameters
    ----------
    encoder : callable
        ``encoder(x)`` with ``x`` a (1, T_in, F) float tensor returns the (1, T, D)
        encoder output (or a tuple starting with it); e.g. a ``torch.nn.Module`` in
        eval mode, or a lambda around your model's encode method.
    features : array-like or tensor, shape (T_in, F)
        One utterance's input (features, or samples as (T_in, 1)).
    declared : int, (layers, per_layer), dict or array, optional
        The declared look-ahead (``{"chunk": C}`` for a chunked encoder; see
        :func:`declared_lookahead`).
    layers : sequence of torch.nn.Module, optional
        The encoder's layers in order: their outputs are recorded too (forward hooks),
        so leaks are told per layer.
    layer_names : sequence of str, optional
    subsampling : int
        Input frames per encoder frame.
    front_end_frames : int
        Input frames past ``i * subsampling`` that the front end itself reads for
        encoder frame ``i`` (its declared right context; 6 for the common 4x front end).
    tol : float
        Absolute output change that counts as moved (default 0: any change).
    seed : int
        Seed of the noise written into the future input.
    double : bool
        Run a float64 copy of the encoder (when it is a ``torch.nn.Module``; the model
        itself is left as it is): a dependence through a long chain of small weights can
        change a float32 output by less than its rounding (a kernel-15 convolution's
        outermost tap three layers deep moves a frame by about 5e-9).

    Returns
    -------
    EncoderLookahead

    Examples
    --------
    >>> import torch                                   # needs the [torch] extra
    >>> conv = torch.nn.Conv1d(1, 1, 5, padding=2)      # non-causal: sees 2 frames ahead
    >>> enc = lambda x: conv(x.transpose(1, 2)).transpose(1, 2)
    >>> m = measure_encoder_lookahead(enc, torch.randn(12, 1), declared=0)
    >>> m.measured.tolist()[:4], m.leaks()[0]
    ([2, 2, 2, 2], 'frames 0-8: each sees 2 frames more than declared: 2 frames ahead, 0 declared')
    """
    import torch

    fn = "measure_encoder_lookahead"
    for name, v, lo in (
        ("subsampling", subsampling, 1),
        ("front_end_frames", front_end_frames, 0),
    ):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
            raise ParameterError(
                f"The '{name}' parameter of {fn} must be an int >= {lo}. Got {v!r} instead."
            )
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and tol >= 0):
        raise ParameterError(
            f"The 'tol' parameter of {fn} must be a float >= 0. Got {tol!r} instead."
        )
    x = torch.as_tensor(np.asarray(features), dtype=torch.float32)
    if x.dim() != 2 or x.shape[0] < 1:
        raise ParameterError(
            f"The 'features' parameter of {fn} must be a (T_in, F) array of one utterance. "
            f"Got shape {tuple(x.shape)} instead."
        )
    layers = list(layers or [])
    names = tuple(layer_names or (f"layer {k + 1}" for k in range(len(layers))))
    T_in = int(x.shape[0])
    if double:
        encoder, layers, dtype = _float64_copy(encoder, layers)
        x = x.to(dtype)
    base, base_layers = _run(encoder, x[None], layers)
    T = int(base.shape[0])
    gen = torch.Generator().manual_seed(int(seed))
    scale = float(x.std()) if T_in > 1 and float(x.std()) > 0 else 1.0
    reach = np.full(T, -1, np.int64)
    layer_reach = np.full((len(layers), T), -1, np.int64)
    for c in _cuts(T_in, subsampling, front_end_frames):  # change frames c+1 .. T_in-1
        xc = x.clone()
        noise = torch.randn(xc[c + 1 :].shape, generator=gen, dtype=torch.float64)
        xc[c + 1 :] = (noise * scale * NOISE_SCALE).to(x.dtype)
        out, outs = _run(encoder, xc[None], layers)
        reach[_moved(base, out, tol)] = c + 1
        for k, (b0, o) in enumerate(zip(base_layers, outs, strict=True)):
            layer_reach[k, _moved(b0, o, tol)] = c + 1
    own = np.arange(T) * subsampling + front_end_frames

    def frames_ahead(r):
        return -((own - r) // subsampling)  # ceil((r - own) / s)

    decl, per = _declared(declared, T)
    return EncoderLookahead(
        measured=frames_ahead(reach),
        reach=reach,
        # the input or the encoder frames end within what the frame may see
        censored=(reach >= T_in - 1) | (np.arange(T) + frames_ahead(reach) >= T - 1),
        declared=decl,
        layer_names=names,
        layer_measured=np.vstack([frames_ahead(r) for r in layer_reach]) if layers else None,
        declared_per_layer=per,
        input_frames=T_in,
        subsampling=int(subsampling),
        front_end_frames=int(front_end_frames),
    )


def _demo_module():
    """The demo encoder as a module ``(1, T_in, 80) -> (1, T, d)`` (defined on first use:
    torch is imported here only)."""
    import torch

    class DemoEncoder(torch.nn.Module):
        def __init__(self, model):
            super().__init__()
            self.model = model

        def forward(self, x):
            from .demo_model import frontend

            t = frontend.n_encoder_frames(int(x.shape[1]))
            return self.model.encode(x, torch.tensor([t]))[0]

    return DemoEncoder


def demo_target(bundle=None) -> dict:
    """What :func:`measure_encoder_lookahead` needs for the shipped demo model.

    Returns
    -------
    dict
        ``encoder`` (module), ``layers`` (its 4 self-attention layers),
        ``layer_names``, ``features`` (``utt -> (T_in, 80)`` normalised log-mel of the
        utterance's audio), ``log_probs`` (encoder output -> CTC log-probs),
        ``subsampling`` 4, ``front_end_frames`` 6 and ``declared`` (4 layers x 1 frame).

    Examples
    --------
    >>> t = demo_target()                              # needs the [torch] extra
    >>> t["subsampling"], t["front_end_frames"], t["declared"], len(t["layers"])
    (4, 6, (4, 1), 4)
    """
    from .demo_model import frontend, load_demo_model

    model, meta = load_demo_model()
    enc = _demo_module()(model).eval()

    def features(utt):
        audio, _ = utt.load_audio()
        return (frontend.logmel(audio) - meta["feat_mean"]) / meta["feat_std"]

    cfg = meta["config"]

    def log_probs(out):
        import torch

        with torch.no_grad():
            return model.ctc_log_probs(out.float())

    return {
        "encoder": enc,
        "log_probs": log_probs,
        "layers": list(model.encoder),
        "layer_names": tuple(f"layer {k + 1}" for k in range(len(model.encoder))),
        "features": features,
        "subsampling": 4,
        "front_end_frames": 6,
        "declared": (int(cfg["enc_layers"]), int(cfg["lookahead_per_layer"])),
    }


def streamed_log_probs(target: dict, utt) -> np.ndarray:
    """CTC log-probs of ``utt`` as a streaming engine without caches computes them.

    Encoder frame ``n`` is taken from a run on the input that has arrived when the
    frame may be emitted: input frames ``[0, n s + f + d_n s]`` (``d_n`` the declared
    look-ahead of frame ``n``, ``s`` the subsampling, ``f`` the front end's right
    context). Compared with the bundle's posteriors (one masked pass over the whole
    input, :func:`peekalign.dumpdiff.frame_diff`) any difference is a leak of the
    future into the offline dump (DEVELOPERS.md, "Dump against engine").

    Parameters
    ----------
    target : dict
        As :func:`demo_target` gives it: ``encoder``, ``features``, ``log_probs``,
        ``subsampling``, ``front_end_frames``, ``declared``.
    utt : Utterance

    Returns
    -------
    ndarray, shape (T, V)

    Examples
    --------
    >>> import peekalign
    >>> from peekalign.data import demo_path
    >>> utt = peekalign.open_bundle(demo_path("full"))["tram-013"]
    >>> lp = streamed_log_probs(demo_target(), utt)      # needs the [torch] extra
    >>> lp.shape == utt.log_probs.shape
    True
    """
    import torch

    x = torch.as_tensor(np.asarray(target["features"](utt)), dtype=torch.float32)
    s, f = int(target.get("subsampling", 1)), int(target.get("front_end_frames", 0))
    enc, head = target["encoder"], target["log_probs"]
    with torch.no_grad():
        full = _as_btd(_first_tensor(enc(x[None])))[0]
        T = int(full.shape[0])
        decl, _ = _declared(target.get("declared", 0), T)
        rows = []
        for n in range(T):
            end = min(x.shape[0], n * s + f + int(decl[n]) * s + 1)
            out = _as_btd(_first_tensor(enc(x[None, :end])))[0]
            rows.append(np.asarray(head(out[n : n + 1]), dtype=np.float64)[0])
    return np.stack(rows) if rows else np.zeros((0, 0))
