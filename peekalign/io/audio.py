"""Audio files: load as float32 mono (through ``soundfile``, resampling with
``librosa``) and write 16-bit PCM WAV."""

from __future__ import annotations

import io
import os
import warnings
from pathlib import Path

import numpy as np
import soundfile as sf

from ..exceptions import BundleError, ParameterError, describe
from .atomic import atomic_write

__all__ = ["load_audio", "write_wav", "wav_bytes"]


def _check_sr(sr: object, func: str, *, optional: bool) -> int | None:
    if sr is None and optional:
        return None
    # A whole-number float (16000.0, e.g. from JSON) is accepted as that int.
    if isinstance(sr, (int, float, np.integer, np.floating)) and not isinstance(sr, bool):
        if float(sr).is_integer() and sr > 0:
            return int(sr)
    raise ParameterError(
        f"The 'sr' parameter of {func} must be an int in the range [1, inf)"
        f"{' or None' if optional else ''}. Got {sr!r} instead."
    )


def load_audio(
    path: str | os.PathLike, *, sr: int | None = None, utt: str | None = None
) -> tuple[np.ndarray, int]:
    """Load an audio file as float32 mono samples.

    Parameters
    ----------
    path : str or path-like
        Any file ``soundfile`` reads (WAV, FLAC, OGG ...).
    sr : int, optional
        Target sample rate. When it differs from the file's rate the signal is
        resampled with :func:`librosa.resample` and a ``UserWarning`` says from which
        rate to which. None keeps the file's rate.
    utt : str, optional
        Utterance id, used in error messages.

    Returns
    -------
    y : numpy.ndarray, shape (n,), float32
        Samples in [-1, 1]; several channels are averaged.
    sr : int
        Sample rate of ``y``.

    Raises
    ------
    BundleError
        When the file is missing, unreadable or corrupt, or holds no samples.
    ParameterError
        When ``sr`` is not a positive int.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> p = os.path.join(tempfile.mkdtemp(), "d-01.wav")
    >>> write_wav(p, np.zeros(800, np.float32), 8000)
    >>> y, sr = load_audio(p)
    >>> y.shape, y.dtype, sr
    ((800,), dtype('float32'), 8000)
    """
    target = _check_sr(sr, "load_audio", optional=True)
    p = Path(path)
    if not p.is_file():
        raise BundleError(
            describe(
                "no file" if not p.exists() else "a folder",
                "an audio file",
                "check the 'audio' path (relative to the bundle folder)",
                utt=utt,
                where=str(p),
            ),
            utt=utt,
        )
    try:
        y, file_sr = sf.read(str(p), dtype="float32", always_2d=True)
    except (sf.LibsndfileError, RuntimeError, TypeError, ValueError) as exc:
        raise BundleError(
            describe(
                f"a file soundfile cannot decode ({exc})",
                "a readable audio file (WAV, FLAC, OGG ...)",
                "re-encode it, e.g. sox in.x -b 16 out.wav, or check it is not truncated",
                utt=utt,
                where=str(p),
            ),
            utt=utt,
        ) from None
    if y.shape[0] == 0:
        raise BundleError(
            describe(
                "0 samples",
                "at least one sample",
                "re-export the audio or drop the 'audio' entry of this utterance",
                utt=utt,
                where=str(p),
            ),
            utt=utt,
        )
    # Averaging keeps the level of in-phase channels (a plain sum would double it).
    y = y.mean(axis=1, dtype=np.float32) if y.shape[1] > 1 else y[:, 0]
    if target is not None and target != file_sr:
        import librosa  # imported late: it takes seconds and most callers never resample

        who = f"utt {utt!r}: " if utt is not None else ""
        warnings.warn(
            f"{who}resampling {p.name} from {file_sr} Hz to {target} Hz", UserWarning, stacklevel=2
        )
        y = librosa.resample(y, orig_sr=file_sr, target_sr=target)
        file_sr = target
    return np.ascontiguousarray(y, dtype=np.float32), int(file_sr)


def write_wav(path: str | os.PathLike, y: np.ndarray, sr: int, *, overwrite: bool = False) -> None:
    """Write samples as a 16-bit PCM WAV file.

    Parameters
    ----------
    path : str or path-like
        Output file (written through a temporary file, then renamed).
    y : numpy.ndarray, shape (n,) or (n, channels)
        Float samples in [-1, 1]; values outside are clipped with a warning.
    sr : int
        Sample rate in Hz.
    overwrite : bool, default False
        Replace an existing file.

    Raises
    ------
    ParameterError
        For a bad ``sr``, an array that is empty, not 1-D/2-D or not finite, or an
        existing file without ``overwrite``.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> p = os.path.join(tempfile.mkdtemp(), "tone.wav")
    >>> write_wav(p, 0.5 * np.sin(2 * np.pi * 440 * np.arange(8000) / 8000), 8000)
    >>> load_audio(p)[0].shape
    (8000,)
    """
    rate = _check_sr(sr, "write_wav", optional=False)
    arr = np.asarray(y)
    if arr.ndim not in (1, 2) or arr.size == 0 or not np.issubdtype(arr.dtype, np.number):
        raise ParameterError(
            "The 'y' parameter of write_wav must be a non-empty numeric array of shape "
            f"(n,) or (n, channels). Got shape {arr.shape} dtype {arr.dtype} instead."
        )
    arr = arr.astype(np.float64)
    if not np.all(np.isfinite(arr)):
        raise ParameterError(
            "The 'y' parameter of write_wav must hold finite samples. Got "
            f"{int(np.sum(~np.isfinite(arr)))} NaN/inf values instead."
        )
    peak = float(np.max(np.abs(arr)))
    if peak > 1.0:
        warnings.warn(
            f"write_wav: clipping samples to [-1, 1] (peak {peak:.3g}); scale the signal "
            "down to keep its shape",
            UserWarning,
            stacklevel=2,
        )
        arr = np.clip(arr, -1.0, 1.0)
    data = wav_bytes(arr, rate)
    with atomic_write(path, overwrite=overwrite, mode="wb") as f:
        f.write(data)


def wav_bytes(y: np.ndarray, sr: int) -> bytes:
    """Encode samples as a 16-bit PCM WAV file in memory.

    libsndfile writes to a Python file through a C callback that cannot pass an
    ``OSError`` on (a full disk became a bare ``AssertionError`` and a short file), so
    writers encode in memory and write the finished bytes themselves.

    Examples
    --------
    >>> import numpy as np
    >>> wav_bytes(np.zeros(10, np.float32), 8000)[:4]
    b'RIFF'
    """
    buf = io.BytesIO()
    sf.write(buf, y, sr, format="WAV", subtype="PCM_16")
    return buf.getvalue()
