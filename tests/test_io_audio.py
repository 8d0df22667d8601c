"""Audio loading and WAV writing."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from conftest import require

from peekalign.exceptions import BundleError, ParameterError
from peekalign.io.audio import load_audio, write_wav


def sine(freq, sr, seconds, amp=0.5):
    t = np.arange(int(sr * seconds)) / sr
    return (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)


def dominant_hz(y, sr):
    # reference: numpy FFT; the peak bin of a windowed real FFT (handbook practice)
    spec = np.abs(np.fft.rfft(y * np.hanning(len(y))))
    return np.fft.rfftfreq(len(y), 1 / sr)[int(np.argmax(spec))]


def test_sine_8k_loads_resampled_to_16k(tmp_path):
    sf = require("soundfile")
    librosa = require("librosa")
    p = tmp_path / "tone.wav"
    x = sine(440.0, 8000, 1.0)
    sf.write(str(p), x, 8000, subtype="PCM_16")  # reference writer: soundfile
    with pytest.warns(UserWarning, match="from 8000 Hz to 16000 Hz"):
        y, sr = load_audio(p, sr=16000, utt="d-01")
    assert sr == 16000 and y.dtype == np.float32 and y.ndim == 1
    # reference: hand-worked length, 1 s at 16 kHz
    assert len(y) == 16000
    # reference: FFT peak of the resampled signal sits at the tone's frequency (1 Hz bins)
    assert abs(dominant_hz(y, sr) - 440.0) <= 1.0
    # reference: librosa.resample on what soundfile reads
    x16, _ = sf.read(str(p), dtype="float32")
    np.testing.assert_allclose(y, librosa.resample(x16, orig_sr=8000, target_sr=16000), atol=1e-6)


def test_no_resample_no_warning(tmp_path):
    sf = require("soundfile")
    p = tmp_path / "tone.wav"
    x = sine(1000.0, 16000, 0.25)
    sf.write(str(p), x, 16000, subtype="PCM_16")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        y, sr = load_audio(p, sr=16000)
    assert sr == 16000
    assert load_audio(p, sr=16000.0)[1] == 16000  # a whole-number float (from JSON) is fine
    # reference: soundfile's own float reading of the same file
    np.testing.assert_array_equal(y, sf.read(str(p), dtype="float32")[0])
    # reference: 16-bit quantisation: half a step, plus |x| / 2**15 because libsndfile
    # scales by 32767 on writing and by 1/32768 on reading (from memory); |x| <= 0.5
    assert np.max(np.abs(y - x)) <= 1.0 / 2**15


def test_stereo_is_averaged(tmp_path):
    sf = require("soundfile")
    p = tmp_path / "stereo.flac"
    left = sine(300.0, 8000, 0.5)
    right = -0.5 * sine(700.0, 8000, 0.5)
    sf.write(str(p), np.stack([left, right], axis=1), 8000)  # reference writer: soundfile
    y, sr = load_audio(p)
    assert sr == 8000 and y.shape == left.shape
    # reference: hand formula, mono = (left + right) / 2, within 16-bit FLAC quantisation
    np.testing.assert_allclose(y, (left + right) / 2, atol=1.0 / 2**15)


def test_missing_corrupt_and_empty_files(tmp_path, rng):
    sf = require("soundfile")
    with pytest.raises(BundleError) as info:
        load_audio(tmp_path / "none.wav", utt="d-07")
    assert "utt 'd-07'" in str(info.value) and "no file" in str(info.value)
    assert info.value.utt == "d-07"

    junk = tmp_path / "junk.wav"
    junk.write_bytes(rng.integers(0, 256, 4000, dtype=np.uint8).tobytes())
    with pytest.raises(BundleError, match=r"utt 'd-07'.*junk\.wav.*cannot decode.*expected"):
        load_audio(junk, utt="d-07")

    cut = tmp_path / "cut.wav"
    sf.write(str(cut), sine(440.0, 8000, 0.5), 8000, subtype="PCM_16")
    cut.write_bytes(cut.read_bytes()[:30])  # header cut in half
    with pytest.raises(BundleError, match="cannot decode"):
        load_audio(cut, utt="d-07")

    empty = tmp_path / "empty.wav"
    sf.write(str(empty), np.zeros(0, np.float32), 8000, subtype="PCM_16")
    with pytest.raises(BundleError, match=r"utt 'd-07'.*0 samples.*at least one"):
        load_audio(empty, utt="d-07")

    with pytest.raises(BundleError, match="a folder"):
        load_audio(tmp_path)


def test_bad_sample_rate_parameter(tmp_path):
    for bad in (0, -16000, 16000.5, float("nan"), "16k", True):
        with pytest.raises(ParameterError, match="'sr' parameter of load_audio"):
            load_audio(tmp_path / "x.wav", sr=bad)


def test_write_wav_is_16_bit_pcm_and_atomic(tmp_path):
    sf = require("soundfile")
    p = tmp_path / "out.wav"
    x = sine(440.0, 16000, 0.2, amp=0.9)
    write_wav(p, x, 16000)
    info = sf.info(str(p))
    # reference: soundfile's header reading
    assert info.subtype == "PCM_16" and info.samplerate == 16000 and info.frames == len(x)
    np.testing.assert_allclose(sf.read(str(p), dtype="float32")[0], x, atol=1.0 / 2**15)
    with pytest.raises(ParameterError, match="overwrite"):
        write_wav(p, x[:10], 16000)
    assert sf.info(str(p)).frames == len(x)
    with pytest.warns(UserWarning, match="clipping"):
        write_wav(p, 2.0 * x, 16000, overwrite=True)
    y, _ = load_audio(p)
    assert y.max() <= 1.0 and y.max() > 0.99  # clipped at full scale
    for bad in (np.zeros(0), np.zeros((2, 2, 2)), np.array([0.0, np.nan])):
        with pytest.raises(ParameterError, match="'y' parameter of write_wav"):
            write_wav(tmp_path / "bad.wav", bad, 16000)
    with pytest.raises(ParameterError, match="'sr' parameter of write_wav"):
        write_wav(tmp_path / "bad.wav", x, 0)
    assert sorted(f.name for f in tmp_path.iterdir()) == ["out.wav"]  # no temp files left
