"""Capture a bundle from a torch model, and run a torch decoder through peekalign.

Optional: needs the ``[torch]`` extra. torch is imported inside the functions and
classes here, never when :mod:`peekalign` is imported.

Two parts:

- :class:`Capture`: forward hooks that record what a bundle needs while the user's own
  code runs the model on a padded batch: CTC log-probabilities, the encoder output and
  the decoder's cross-attention per layer and head. Attention comes from
  ``torch.nn.MultiheadAttention`` (its weights are asked for, per head) or, for attention
  modules of the user's own and for fused kernels that never materialise the weights,
  is recomputed as ``softmax(Q K^T / sqrt(d) + mask)`` from captured queries and keys
  (:class:`QK`, :func:`attention_from_qk`). :meth:`Capture.utterances` strips the
  padding by lengths and :meth:`Capture.write` writes them through
  :class:`peekalign.BundleWriter`.
- :class:`TorchDecoder`: wraps a torch decoder ``(encoder_out, prefix) -> logits`` into
  peekalign's decoder protocol (``open(utt).log_probs(prefixes, last_frames)``), batched,
  without gradients, with the log-probabilities of each (prefix, last frame) kept so a
  search asking for a prefix again costs nothing.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .exceptions import BundleError, ParameterError, describe

__all__ = ["QK", "Capture", "TorchDecoder", "attention_from_qk"]


def _torch():
    try:
        import torch
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise ImportError(
            "peekalign.torch_capture needs torch; install it with pip install peekalign[torch]"
        ) from exc
    return torch


def attention_from_qk(
    q,
    k,
    *,
    heads: int,
    key_padding_mask=None,
    attn_mask=None,
    scale: float | None = None,
):
    """Attention weights ``softmax(Q K^T * scale + mask)`` per head from projected Q and K.

    Parameters
    ----------
    q : Tensor (B, U, H*d)
        Projected queries (after the query projection, before splitting heads).
    k : Tensor (B, T, H*d)
        Projected keys.
    heads : int
        Number of heads H; the last axis is split into H blocks of d.
    key_padding_mask : bool Tensor (B, T), optional
        True where a key is padding (never attended).
    attn_mask : Tensor (U, T) or (B*H, U, T), optional
        Boolean (True = hidden) or additive float mask, as ``nn.MultiheadAttention``
        takes it.
    scale : float, optional
        Default ``1 / sqrt(d)``.

    Returns
    -------
    Tensor (B, H, U, T)
        Rows sum to 1 over the visible keys.

    Examples
    --------
    >>> import torch
    >>> q, k = torch.zeros(1, 2, 4), torch.zeros(1, 3, 4)
    >>> attention_from_qk(q, k, heads=2).shape
    torch.Size([1, 2, 2, 3])
    """
    torch = _torch()
    b, u, e = q.shape
    t = k.shape[1]
    if e % heads or k.shape[-1] != e:
        raise ParameterError(
            f"found queries of width {e} and keys of width {k.shape[-1]} for {heads} heads, "
            "expected equal widths divisible by the number of heads; pass the projected "
            "Q and K of one attention module"
        )
    d = e // heads
    qh = q.reshape(b, u, heads, d).transpose(1, 2).to(torch.float64)
    kh = k.reshape(b, t, heads, d).transpose(1, 2).to(torch.float64)
    scores = qh @ kh.transpose(-1, -2) * (scale if scale is not None else 1.0 / math.sqrt(d))
    if attn_mask is not None:
        mask = attn_mask.reshape(-1, heads, u, t) if attn_mask.dim() == 3 else attn_mask
        if mask.dtype == torch.bool:
            scores = scores.masked_fill(mask, -math.inf)
        else:
            scores = scores + mask.to(scores.dtype)
    if key_padding_mask is not None:
        scores = scores.masked_fill(key_padding_mask[:, None, None, :].bool(), -math.inf)
    return torch.softmax(scores, dim=-1).to(q.dtype)


@dataclass(frozen=True)
class QK:
    """Where to find the projected queries and keys of one attention module.

    For attention classes of the user's own, or fused kernels that never return the
    weights: the outputs of the two projection modules are recorded and the weights
    recomputed with :func:`attention_from_qk`.

    Parameters
    ----------
    query, key : str
        Dotted module names (as in ``model.named_modules()``) of the query and key
        projections; their outputs are (B, U, H*d) and (B, T, H*d).
    heads : int
    scale : float, optional
        Default ``1 / sqrt(d)``.

    Examples
    --------
    >>> QK("decoder.0.q_proj", "decoder.0.k_proj", heads=4).heads
    4
    """

    query: str
    key: str
    heads: int
    scale: float | None = None


class Capture:
    """Forward hooks recording CTC log-probs, encoder output and cross-attention.

    Use as a context manager around the user's own forward pass on a padded batch; the
    hooks are removed on exit.

    Parameters
    ----------
    model : torch.nn.Module
    log_probs : str
        Name of the module whose output is the CTC output (B, T, V): logits or
        log-probabilities (``log_softmax`` is applied; it leaves log-probs unchanged).
    encoder : str, optional
        Name of the module whose output is the encoder output (B, T, D) the decoder
        attends to (first element when it returns a tuple).
    attention : sequence of str, optional
        Names of ``nn.MultiheadAttention`` modules, one per decoder layer, in layer
        order. Default: every ``nn.MultiheadAttention`` in the model that is called with
        a key other than its query (cross-attention; self-attention is called with the
        same tensor three times), in the order of the model's modules.
    qk : sequence of QK, optional
        Attention modules given by their Q and K projections instead (recomputed).
    recompute : bool
        Recompute ``nn.MultiheadAttention`` weights from its own in-projection and the
        captured query, key and masks instead of asking the module for them (the path
        for code that calls it with ``need_weights=False`` on a fused kernel, and a
        check of the recomputation).

    Attributes
    ----------
    log_probs : Tensor (B, T, V) or None
    encoder_out : Tensor (B, T, D) or None
    attention : Tensor (B, L, H, U, T) or None
        The last call of each attention module, stacked in layer order.

    Examples
    --------
    >>> import torch
    >>> net = torch.nn.Sequential(torch.nn.Linear(4, 3))
    >>> with Capture(net, log_probs="0") as cap:
    ...     _ = net(torch.zeros(1, 5, 4))
    >>> tuple(cap.log_probs.shape)
    (1, 5, 3)
    """

    def __init__(
        self,
        model,
        *,
        log_probs: str,
        encoder: str | None = None,
        attention: Sequence[str] | None = None,
        qk: Sequence[QK] | None = None,
        recompute: bool = False,
    ) -> None:
        torch = _torch()
        self.model = model
        self._modules = dict(model.named_modules())
        names = [log_probs] + ([encoder] if encoder else [])
        names += list(attention or []) + [n for s in qk or [] for n in (s.query, s.key)]
        missing = [n for n in names if n not in self._modules]
        if missing:
            some = ", ".join(n for n in list(self._modules)[1:8])
            raise ParameterError(
                f"found no module {missing[0]!r} in the model, expected names as in "
                f"model.named_modules() (e.g. {some}); fix the name"
            )
        self._log_probs_name, self._encoder_name = log_probs, encoder
        mha = torch.nn.MultiheadAttention
        if attention is None and not qk:
            self._att_names = [n for n, m in self._modules.items() if isinstance(m, mha)]
            self._auto = True
        else:
            self._att_names = list(attention or [])
            self._auto = False
        for n in self._att_names:
            if not isinstance(self._modules[n], mha):
                raise ParameterError(
                    f"module {n!r} is a {type(self._modules[n]).__name__}, expected "
                    "torch.nn.MultiheadAttention; name its Q and K projections with qk=[QK(...)]"
                )
        self._qk = list(qk or [])
        self.recompute = recompute
        self._handles: list[Any] = []
        self.clear()

    def clear(self) -> None:
        """Forget everything recorded so far."""
        self.log_probs = self.encoder_out = None
        self._att: dict[str, Any] = {}
        self._proj: dict[str, Any] = {}

    # -- hooks -----------------------------------------------------------------------
    def __enter__(self) -> Capture:
        m = self._modules
        self._handles.append(m[self._log_probs_name].register_forward_hook(self._on_ctc))
        if self._encoder_name:
            self._handles.append(m[self._encoder_name].register_forward_hook(self._on_encoder))
        for name in self._att_names:
            self._handles.append(
                m[name].register_forward_pre_hook(self._pre_mha(name), with_kwargs=True)
            )
            self._handles.append(
                m[name].register_forward_hook(self._post_mha(name), with_kwargs=True)
            )
        for spec in self._qk:
            for name in (spec.query, spec.key):
                self._handles.append(m[name].register_forward_hook(self._on_proj(name)))
        return self

    def __exit__(self, *exc) -> None:
        for h in self._handles:
            h.remove()
        self._handles.clear()

    def _on_ctc(self, module, args, output) -> None:
        torch = _torch()
        out = output[0] if isinstance(output, (tuple, list)) else output
        self.log_probs = torch.log_softmax(out.detach().float(), dim=-1)

    def _on_encoder(self, module, args, output) -> None:
        out = output[0] if isinstance(output, (tuple, list)) else output
        self.encoder_out = out.detach()

    def _on_proj(self, name: str):
        def hook(module, args, output) -> None:
            self._proj[name] = output.detach()

        return hook

    def _pre_mha(self, name: str):
        """Record the call's inputs; ask for per-head weights unless recomputing."""

        def hook(module, args, kwargs):
            names = ("query", "key", "value", "key_padding_mask", "need_weights", "attn_mask")
            call = dict(zip(names, args, strict=False))
            call.update(kwargs)
            if self._auto and call["key"] is call["query"]:
                return None  # self-attention: not a cross-attention layer
            self._att[name] = {"call": call, "need_weights": call.get("need_weights", True)}
            if self.recompute:
                return None
            kwargs = {k: v for k, v in kwargs.items()}
            for i, key in enumerate(names[3:], start=3):
                if len(args) > i:
                    kwargs[key] = args[i]
            kwargs.update(need_weights=True, average_attn_weights=False)
            return args[:3], kwargs

        return hook

    def _post_mha(self, name: str):
        def hook(module, args, kwargs, output):
            rec = self._att.get(name)
            if rec is None or "weights" in rec:
                return None
            if self.recompute:
                rec["weights"] = _mha_recompute(module, rec.pop("call"))
                return None
            rec.pop("call")
            rec["weights"] = output[1].detach()
            if not rec["need_weights"]:
                return output[0], None  # the caller asked for no weights
            return None

        return hook

    # -- results ---------------------------------------------------------------------
    @property
    def attention(self):
        """(B, L, H, U, T): cross-attention of each layer's last call, in layer order.

        Layers given by :class:`QK` are recomputed here without a padding mask;
        :meth:`utterances` masks their padded keys by the lengths it is given.
        """
        return self._stack()

    def _stack(self, key_padding_mask=None):
        torch = _torch()
        layers = []
        for name in self._att_names:
            rec = self._att.get(name)
            if rec is not None and "weights" in rec:
                layers.append(rec["weights"])
        for spec in self._qk:
            if spec.query in self._proj and spec.key in self._proj:
                q, k = self._proj[spec.query], self._proj[spec.key]
                layers.append(
                    attention_from_qk(
                        q, k, heads=spec.heads, scale=spec.scale, key_padding_mask=key_padding_mask
                    )
                )
        if not layers:
            return None
        return torch.stack(layers, dim=1)

    def utterances(
        self, frame_lengths: Sequence[int], token_lengths: Sequence[int] | None = None
    ) -> list[dict[str, np.ndarray]]:
        """Per-utterance numpy arrays with the padding stripped.

        Parameters
        ----------
        frame_lengths : sequence of int
            Encoder frames of each utterance in the batch.
        token_lengths : sequence of int, optional
            Decoder steps of each utterance (rows of its attention); default all.

        Returns
        -------
        list of dict
            ``log_probs`` (T_i, V), ``encoder_out`` (T_i, D) and ``attention``
            (L, H, U_i, T_i) when recorded. With keys masked as padding the weights of a
            row sum to 1 over the first T_i frames, so nothing is lost by the cut.
        """
        if self.log_probs is None:
            raise ParameterError(
                "found no recorded CTC output, expected a forward pass inside the "
                "'with Capture(...)' block; run the model there"
            )
        torch = _torch()
        b, t_max = self.log_probs.shape[:2]
        if len(frame_lengths) != b or (token_lengths is not None and len(token_lengths) != b):
            raise ParameterError(
                f"found {len(frame_lengths)} frame lengths for a batch of {b}, expected one "
                "length per utterance; pass the encoder lengths of this batch"
            )
        lengths = torch.as_tensor([int(n) for n in frame_lengths])
        att = self._stack(torch.arange(t_max)[None, :] >= lengths[:, None])
        out = []
        for i in range(b):
            t = int(frame_lengths[i])
            item = {"log_probs": self.log_probs[i, :t].cpu().numpy()}
            if self.encoder_out is not None:
                item["encoder_out"] = self.encoder_out[i, :t].float().cpu().numpy()
            if att is not None:
                u = att.shape[3] if token_lengths is None else int(token_lengths[i])
                item["attention"] = att[i, :, :, :u, :t].float().cpu().numpy()
            out.append(item)
        return out

    def write(
        self,
        writer,
        ids: Sequence[str],
        frame_lengths: Sequence[int],
        token_lengths: Sequence[int] | None = None,
        *,
        refs: Sequence[str],
        attention_tokens: Sequence[Sequence[int]] | None = None,
        encoder_dtype=np.float16,
        **per_utt: Sequence[Any],
    ) -> None:
        """Add the batch to an open :class:`peekalign.BundleWriter`, padding stripped.

        ``per_utt`` holds further :meth:`BundleWriter.add` arguments, one value per
        utterance (``hyp=[...]``, ``audio=[...]``, ``words=[...]``, ``extra=[...]``).
        The encoder output is stored as ``encoder_dtype`` (float16 halves the size).
        """
        items = self.utterances(frame_lengths, token_lengths)
        for i, (uid, item) in enumerate(zip(ids, items, strict=True)):
            kw = {k: v[i] for k, v in per_utt.items()}
            if "attention" in item:
                kw["attention"] = item["attention"].astype(np.float16)
                if attention_tokens is not None:
                    kw["attention_tokens"] = attention_tokens[i]
            if "encoder_out" in item:
                kw["encoder_out"] = item["encoder_out"].astype(encoder_dtype)
            writer.add(uid, item["log_probs"], ref=refs[i], **kw)


def _mha_recompute(module, call: dict[str, Any]):
    """Weights of one ``nn.MultiheadAttention`` call from its in-projection and masks."""
    torch = _torch()
    functional = torch.nn.functional
    query, key = call["query"].detach(), call["key"].detach()
    if not module.batch_first:
        query, key = query.transpose(0, 1), key.transpose(0, 1)
    e = module.embed_dim
    if module.in_proj_weight is not None:
        wq, wk = module.in_proj_weight[:e], module.in_proj_weight[e : 2 * e]
    else:
        wq, wk = module.q_proj_weight, module.k_proj_weight
    bq = bk = None
    if module.in_proj_bias is not None:
        bq, bk = module.in_proj_bias[:e], module.in_proj_bias[e : 2 * e]
    with torch.no_grad():
        q = functional.linear(query, wq, bq)
        k = functional.linear(key, wk, bk)
        return attention_from_qk(
            q,
            k,
            heads=module.num_heads,
            key_padding_mask=call.get("key_padding_mask"),
            attn_mask=call.get("attn_mask"),
        )


class TorchDecoder:
    """peekalign's decoder protocol around a torch decoder ``(encoder_out, prefix) -> logits``.

    Parameters
    ----------
    decoder : callable
        ``decoder(encoder_out, prefix)``: ``encoder_out`` a float tensor (B, T', D),
        the utterance's encoder output cut to frames ``[0, last_frame]`` (one view
        expanded over the batch), ``prefix`` a long tensor (B, U) of decoder input ids
        (``sos`` first when given). Returns logits (B, U, V_dec) (the last step is used)
        or (B, V_dec). Called under ``torch.no_grad()``.
    eos : int
        Index of end-of-sentence in the decoder's output.
    sos : int, optional
        Start symbol put in front of every prefix.
    encode : callable, optional
        ``encode(utt) -> (T, D)`` array or tensor, used when a bundle carries no
        ``encoder_out`` (e.g. recompute it from the audio).
    batch_size : int
        Most prefixes in one call of ``decoder``.
    cache_size : int
        (prefix, last frame) results kept per utterance.
    device : str
    threads : int or None
        torch threads to compute with, set when an utterance is opened (default 1:
        peekalign runs one decoder per worker process, and a torch thread pool started
        in a process that later forks its workers can hang them). None leaves torch's
        own setting.

    Examples
    --------
    >>> import torch, numpy as np
    >>> from peekalign import Utterance
    >>> def dec(enc, prefix):  # a toy decoder: the mean of the visible frames
    ...     return enc.mean(dim=1)[:, None, :].expand(-1, prefix.shape[1], -1)
    >>> u = Utterance.from_arrays(np.log(np.full((4, 3), 1 / 3)), ref="", vocab="-ab",
    ...                           encoder_out=np.eye(4, 3, dtype=np.float32))
    >>> d = TorchDecoder(dec, eos=2).open(u)
    >>> d.log_probs([[1], [1]], [0, 3]).shape
    (2, 3)
    """

    def __init__(
        self,
        decoder: Callable,
        *,
        eos: int,
        sos: int | None = None,
        encode: Callable | None = None,
        batch_size: int = 64,
        cache_size: int = 20000,
        device: str = "cpu",
        threads: int | None = 1,
    ) -> None:
        self.decoder = decoder
        self.threads = threads
        self.eos = int(eos)
        self.sos = sos
        self.encode = encode
        self.batch_size = int(batch_size)
        self.cache_size = int(cache_size)
        self.device = device

    def open(self, utt) -> _UtteranceDecoder:
        """The decoder bound to one utterance's encoder output."""
        torch = _torch()
        if self.threads is not None and torch.get_num_threads() != self.threads:
            torch.set_num_threads(int(self.threads))
        enc = utt.encoder_out
        if enc is None and self.encode is not None:
            enc = self.encode(utt)
        if enc is None:
            raise BundleError(
                describe(
                    "no encoder_out array",
                    "the encoder output in the bundle, or an encode= function",
                    "capture the bundle with peekalign.torch_capture (it stores encoder_out) "
                    "or pass TorchDecoder(..., encode=...)",
                    utt=utt.id,
                ),
                utt=utt.id,
            )
        enc = torch.as_tensor(np.asarray(enc) if not torch.is_tensor(enc) else enc)
        enc = enc.to(self.device, torch.float32)
        return _UtteranceDecoder(self, enc, utt.id)


class _UtteranceDecoder:
    """One utterance: groups requests by (window, prefix length) and keeps the results."""

    def __init__(self, owner: TorchDecoder, enc, uid: str) -> None:
        self.owner = owner
        self.enc = enc  # (T, D)
        self.id = uid
        self._cache: OrderedDict[tuple[int, tuple[int, ...]], np.ndarray] = OrderedDict()

    @property
    def num_frames(self) -> int:
        return int(self.enc.shape[0])

    def log_probs(
        self, prefixes: Sequence[Sequence[int]], last_frames: Sequence[int]
    ) -> np.ndarray:
        """(B, V_dec) log-probabilities of the next token for each (prefix, last frame)."""
        if len(prefixes) != len(last_frames):
            raise ParameterError(
                f"utt {self.id!r}: found {len(prefixes)} prefixes and {len(last_frames)} "
                "last frames, expected one last frame per prefix"
            )
        keys = []
        for p, f in zip(prefixes, last_frames, strict=True):
            f = int(f)
            if not 0 <= f < self.num_frames:
                raise ParameterError(
                    f"utt {self.id!r}: found last frame {f}, expected 0..{self.num_frames - 1} "
                    "(the encoder frames); clip the window to the utterance"
                )
            keys.append((f, tuple(int(t) for t in p)))
        todo = sorted({k for k in keys if k not in self._cache})
        groups: dict[tuple[int, int], list] = {}
        for k in todo:
            groups.setdefault((k[0], len(k[1])), []).append(k)
        for (frame, _), group in groups.items():
            for s in range(0, len(group), self.owner.batch_size):
                self._run(frame, group[s : s + self.owner.batch_size])
        out = np.stack([self._cache[k] for k in keys])
        for k in keys:
            self._cache.move_to_end(k)
        while len(self._cache) > self.owner.cache_size:
            self._cache.popitem(last=False)
        return out

    def _run(self, frame: int, group: list[tuple[int, tuple[int, ...]]]) -> None:
        """One forward pass over prefixes of equal length seeing frames [0, frame]."""
        torch = _torch()
        sos = [] if self.owner.sos is None else [int(self.owner.sos)]
        ys = torch.tensor([sos + list(p) for _, p in group], dtype=torch.long)
        if ys.shape[1] == 0:
            raise ParameterError(
                f"utt {self.id!r}: found an empty prefix and no sos, expected a start "
                "symbol; pass TorchDecoder(..., sos=<start id>)"
            )
        mem = self.enc[: frame + 1][None].expand(len(group), -1, -1)
        with torch.no_grad():
            logits = self.owner.decoder(mem, ys.to(self.enc.device))
            if logits.dim() == 3:
                logits = logits[:, -1]
            lp = torch.log_softmax(logits.float(), dim=-1).cpu().numpy()
        for k, row in zip(group, lp, strict=True):
            self._cache[k] = row
