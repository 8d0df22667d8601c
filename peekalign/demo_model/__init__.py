"""The demo recognizer: model code, shipped weights and a decoder for the demo bundles.

A tiny streaming CTC/attention model trained on synthetic tram-depot dispatch speech
(``fixtures/make``). Its weights ship as package data, ``peekalign/data/demo/model.npz``
(float16 arrays, read without pickle) with ``model.json`` (configuration, feature
normalisation and training facts), so a decoder can be re-run on the demo bundles on a
fresh machine. Needs the ``[torch]`` extra; this module imports torch only when a
function here is called.

Examples
--------
>>> from peekalign.demo_model import demo_decoder  # doctest: +SKIP
>>> from peekalign.data import demo_path            # doctest: +SKIP
>>> dec = demo_decoder(demo_path("full"))           # doctest: +SKIP
"""

from __future__ import annotations

import json
import os
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import BundleError, ParameterError, describe
from . import frontend

__all__ = [
    "checkpoint_paths",
    "demo_decoder",
    "encode_audio",
    "load_demo_model",
    "save_checkpoint",
]

_NO_TORCH = (
    "the demo model needs torch, found none installed; install it with "
    "pip install peekalign[torch] (CPU build is enough)"
)


def _torch():
    try:
        import torch
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise ImportError(_NO_TORCH) from exc
    return torch


def checkpoint_paths(folder: str | os.PathLike | None = None) -> tuple[Path, Path]:
    """Paths of the weights (``model.npz``) and the configuration (``model.json``).

    Examples
    --------
    >>> [p.name for p in checkpoint_paths()]
    ['model.npz', 'model.json']
    """
    if folder is None:
        base = Path(str(resources.files("peekalign.data"))) / "demo"
    else:
        base = Path(folder)
    return base / "model.npz", base / "model.json"


def save_checkpoint(
    model, info: dict[str, Any], folder: str | os.PathLike, *, dtype=np.float16
) -> tuple[Path, Path]:
    """Write ``model.npz`` (weights as ``dtype``) and ``model.json`` into ``folder``.

    ``info`` must hold ``mean`` and ``std`` (feature normalisation, stored as float32
    arrays beside the weights) and may hold anything JSON can (training facts).
    """
    weights_path, config_path = checkpoint_paths(folder)
    arrays = {k: v.detach().cpu().numpy().astype(dtype) for k, v in model.state_dict().items()}
    arrays["feat_mean"] = np.asarray(info["mean"], dtype=np.float32).reshape(-1)
    arrays["feat_std"] = np.asarray(info["std"], dtype=np.float32).reshape(-1)
    Path(folder).mkdir(parents=True, exist_ok=True)
    with open(weights_path, "wb") as f:
        np.savez_compressed(f, **arrays)
    meta = {
        "config": model.config,
        "dtype": np.dtype(dtype).name,
        "vocab": frontend.VOCAB,
        "sos_eos": frontend.SOS_EOS,
        **{k: v for k, v in info.items() if k not in ("mean", "std")},
    }
    config_path.write_text(json.dumps(meta, indent=2) + "\n")
    return weights_path, config_path


def load_demo_model(folder: str | os.PathLike | None = None):
    """The demo model (eval mode, float32 compute) and its ``model.json`` facts.

    Returns
    -------
    model : peekalign.demo_model.network.TinyRecognizer
    meta : dict
        ``config``, ``vocab``, ``sos_eos``, ``feat_mean``, ``feat_std`` and training facts.

    Examples
    --------
    >>> model, meta = load_demo_model()  # doctest: +SKIP
    >>> meta["sos_eos"]                  # doctest: +SKIP
    29
    """
    torch = _torch()
    from .network import TinyRecognizer

    weights_path, config_path = checkpoint_paths(folder)
    if not weights_path.is_file() or not config_path.is_file():
        raise BundleError(
            describe(
                f"no demo checkpoint at {str(weights_path.parent)!r}",
                "model.npz and model.json (package data)",
                "reinstall peekalign from a complete source tree or wheel",
            )
        )
    meta = json.loads(config_path.read_text())
    model = TinyRecognizer(**meta["config"])
    with np.load(weights_path, allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    meta["feat_mean"] = arrays.pop("feat_mean")
    meta["feat_std"] = arrays.pop("feat_std")
    state = {k: torch.from_numpy(v.astype(np.float32)) for k, v in arrays.items()}
    model.load_state_dict(state)
    model.eval()
    return model, meta


def encode_audio(model, meta: dict[str, Any], audio: np.ndarray):
    """Encoder output (T, D) tensor and CTC log-probs (T, V) of one 16 kHz clip."""
    torch = _torch()
    feats = (frontend.logmel(audio) - meta["feat_mean"]) / meta["feat_std"]
    x = torch.from_numpy(np.ascontiguousarray(feats, dtype=np.float32))[None]
    t = frontend.n_encoder_frames(len(feats))
    with torch.no_grad():
        enc, _ = model.encode(x, torch.tensor([t]))
        return enc[0], model.ctc_log_probs(enc)[0]


def demo_decoder(bundle=None, *, folder: str | os.PathLike | None = None):
    """The demo model's attention decoder as a peekalign decoder.

    Uses each utterance's ``encoder_out`` when the bundle has it, else recomputes the
    encoder from the bundle's audio with the demo front end.

    Parameters
    ----------
    bundle : Bundle or path, optional
        Checked to use the demo's vocabulary.
    folder : path, optional
        Folder with ``model.npz`` and ``model.json`` (default: the package data).

    Returns
    -------
    peekalign.torch_capture.TorchDecoder
        ``eos`` is the model's end symbol (id 29, after the 29 CTC tokens).

    Examples
    --------
    >>> from peekalign.data import demo_path             # doctest: +SKIP
    >>> dec = demo_decoder(demo_path("streaming"))      # doctest: +SKIP
    >>> utt = dec.open(peekalign.open_bundle(demo_path("streaming"))["tram-001"])  # doctest: +SKIP
    """
    torch = _torch()
    from ..torch_capture import TorchDecoder

    # one thread, set before any torch work: see TorchDecoder(threads=...)
    if torch.get_num_threads() != 1:
        torch.set_num_threads(1)

    if bundle is not None:
        _check_vocab(bundle)
    model, meta = load_demo_model(folder)

    def run(enc, prefix):
        return model.decode(prefix, enc, None)

    def encode(utt):
        audio, _ = utt.load_audio()
        enc, _ = encode_audio(model, meta, audio)
        if enc.shape[0] != utt.num_frames:
            raise BundleError(
                describe(
                    f"{enc.shape[0]} encoder frames from its audio",
                    f"{utt.num_frames} (the frames of log_probs)",
                    "use the demo model only on bundles made from it",
                    utt=utt.id,
                ),
                utt=utt.id,
            )
        return enc

    dec = TorchDecoder(run, eos=meta["sos_eos"], sos=meta["sos_eos"], encode=encode)
    dec.model, dec.meta = model, meta
    return dec


def _check_vocab(bundle) -> None:
    from ..model import Bundle, open_bundle

    b = bundle if isinstance(bundle, Bundle) else open_bundle(bundle)
    if list(b.vocab.tokens) != frontend.VOCAB:
        raise ParameterError(
            f"found a bundle of {len(b.vocab)} tokens ({', '.join(b.vocab.tokens[:5])}, ...), "
            f"expected the demo model's {len(frontend.VOCAB)} (<blank>, |, ', a-z); use "
            "--decoder MODULE:FACTORY with your own model's decoder"
        )
