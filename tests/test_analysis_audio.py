"""Reading recordings: formats, mixdown, resampling, and every bad input with its message."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from voicer.analysis.audio import (
    MAX_CLIPPED_FRACTION,
    Recording,
    check_signal,
    load_recording,
)
from voicer.errors import ParameterError, RecordingError, VoicerError

SR = 44_100


def sine(freq_hz: float, seconds: float, *, amp: float = 0.5, sample_rate: int = SR) -> np.ndarray:
    t = np.arange(round(seconds * sample_rate)) / sample_rate
    return amp * np.sin(2 * np.pi * freq_hz * t)


def peak_hz(x: np.ndarray, sample_rate: int) -> float:
    """Frequency of the largest FFT peak (Hann window, parabola through the log magnitude)."""
    mag = np.log(np.abs(np.fft.rfft(x * np.hanning(len(x)))) + 1e-30)
    i = int(np.argmax(mag))
    delta = 0.5 * (mag[i - 1] - mag[i + 1]) / (mag[i - 1] - 2 * mag[i] + mag[i + 1])
    return (i + delta) * sample_rate / len(x)


def rejected(path, match: str) -> RecordingError:
    with pytest.raises(RecordingError, match=match) as info:
        load_recording(path)
    err = info.value
    assert isinstance(err, VoicerError)  # the CLI reports these in one line, exit 2
    assert str(err).startswith(str(path)) and err.file == str(path)
    return err


# --- bad input -------------------------------------------------------------------------

def test_missing_empty_and_text_files(tmp_path) -> None:
    rejected(tmp_path / "nowhere.wav", "no such file")
    empty = tmp_path / "empty.wav"
    empty.write_bytes(b"")
    rejected(empty, r"is empty \(0 bytes\): the recording was not saved, or not completely")
    text = tmp_path / "notes.wav"
    text.write_text("C4 mf, C4 ff, D4 mf\n")
    rejected(text, r"cannot be read as audio.*formats read: .*MP3.*OGG.*WAV.*\(libsndfile ")


def test_no_samples_and_too_short(tmp_path) -> None:
    none = tmp_path / "none.wav"
    sf.write(none, np.zeros((0, 1)), SR)
    rejected(none, "holds no samples")
    short = tmp_path / "short.wav"
    sf.write(short, sine(440, 0.002), SR)  # 2 ms
    rejected(short, r"lasts 2\.0 ms \(88 frames at 44100 Hz\); a note needs at least 0\.25 s")


def test_silence(tmp_path) -> None:
    zeros = tmp_path / "zeros.wav"
    sf.write(zeros, np.zeros(SR), SR, subtype="PCM_16")
    rejected(zeros, "is silent: every sample is zero")
    hiss = tmp_path / "hiss.flac"
    sf.write(hiss, np.random.default_rng(0).normal(0, 10 ** (-80 / 20), SR), SR, subtype="PCM_24")
    rejected(hiss, r"is silent: its peak is -6\d\.\d dBFS, below the -60 dBFS needed")


def test_clipped_file(tmp_path) -> None:
    # a sine driven 3.5 dB beyond full scale after half a second of a clean one, as an
    # ADC delivers it: flat at the largest codes (PCM_16 reads +32767/32768 and -1.0)
    x = np.r_[sine(440, 0.5, amp=0.5), np.clip(sine(440, 0.5, amp=1.5), -1.0, 1.0)]
    path = tmp_path / "clipped.wav"
    sf.write(path, x, SR, subtype="PCM_16")
    err = rejected(path, r"is clipped: 2\d\.\d\d % of the frames sit at full scale \(at most 0\.1 % is tolerated\)")
    # the first clipped run starts where 1.5 sin reaches 1: asin(2/3) / (2 pi 440) after 0.5 s
    assert err.time_s == pytest.approx(0.5 + np.arcsin(2 / 3) / (2 * np.pi * 440), abs=2 / SR)
    assert "clipped.wav at 0.50 s" in str(err)


def test_clipping_tolerated_and_full_scale_is_not_clipping(tmp_path) -> None:
    x = sine(110, 1.0, amp=0.999)  # full scale, never flat: not clipped
    path = tmp_path / "loud.wav"
    sf.write(path, x, SR, subtype="PCM_16")
    assert load_recording(path).clipped_fraction == 0.0
    # three short flat runs at the attack: tolerated and reported
    y = x.copy()
    for start in (1000, 3000, 5000):
        y[start : start + 4] = 1.0
    sf.write(path, y, SR, subtype="FLOAT")
    rec = load_recording(path)
    assert rec.clipped_fraction == pytest.approx(12 / SR)
    assert 0 < rec.clipped_fraction <= MAX_CLIPPED_FRACTION
    # two equal samples at the extreme are not a run
    z = x.copy()
    z[1000:1002] = 1.0
    assert check_signal(z, SR, file="capture") == 0.0


def test_too_many_channels(tmp_path) -> None:
    path = tmp_path / "array.wav"
    sf.write(path, np.tile(sine(440, 0.5)[:, None], (1, 32)), SR)
    rejected(path, "has 32 channels; a piano recording has 1 to 8")


def test_nan_samples(tmp_path) -> None:
    x = sine(440, 1.0)
    x[round(0.3 * SR) + 7] = np.nan
    path = tmp_path / "nan.wav"
    sf.write(path, x, SR, subtype="FLOAT")
    err = rejected(path, r"nan\.wav at 0\.30 s: holds non-finite samples \(NaN or infinity\)")
    assert err.time_s == pytest.approx(0.3 + 7 / SR)


def test_check_signal_on_captured_audio() -> None:
    """The guided recorder checks captured blocks: times are given in the file."""
    block = np.zeros((SR, 2))
    block[:, 0] = sine(440, 1.0)
    block[SR // 2, 1] = np.inf
    with pytest.raises(RecordingError, match=r"take C4 mf at 12\.50 s: holds non-finite samples"):
        check_signal(block, SR, file="take C4 mf", start_s=12.0)
    assert check_signal(sine(440, 0.3), SR, file="take C4 mf") == 0.0
    with pytest.raises(RecordingError, match=r"take C4 mf: lasts 200\.0 ms"):
        check_signal(sine(440, 0.2), SR, file="take C4 mf")


def test_sample_rate_argument() -> None:
    with pytest.raises(ParameterError, match=r"sample_rate=0 must be a positive integer"):
        load_recording("whatever.wav", sample_rate=0)
    with pytest.raises(ParameterError, match=r"sample_rate=44100\.0 must be a positive integer"):
        load_recording("whatever.wav", sample_rate=44100.0)


# --- good input ------------------------------------------------------------------------

def test_stereo_mixdown(tmp_path) -> None:
    left, right = sine(440, 0.5, amp=0.6), sine(660, 0.5, amp=0.2)
    path = tmp_path / "stereo.wav"
    sf.write(path, np.stack([left, right], axis=1), SR, subtype="FLOAT")
    rec = load_recording(path)
    assert isinstance(rec, Recording)
    assert (rec.channels, rec.sample_rate, rec.file_rate) == (2, SR, SR)
    assert rec.samples.dtype == np.float64 and rec.samples.ndim == 1
    # float32 storage: exact to its resolution
    np.testing.assert_allclose(rec.samples, (left + right) / 2, atol=1e-7)
    assert rec.duration_s == pytest.approx(0.5)


def test_resampling_keeps_frequency_and_level(tmp_path) -> None:
    path = tmp_path / "cd.flac"
    sf.write(path, sine(1000.0, 1.0, amp=0.5), SR, subtype="PCM_24")
    rec = load_recording(path, sample_rate=48_000)
    assert (rec.sample_rate, rec.file_rate) == (48_000, SR)
    assert len(rec.samples) == 48_000
    # the sine's frequency (FFT peak; 0.01 Hz is far below the 1 Hz bins) and its RMS
    # level away from the ends (0.01 dB; the resampler's passband ripple is smaller)
    assert peak_hz(rec.samples, 48_000) == pytest.approx(1000.0, abs=0.01)
    inner = rec.samples[2400:-2400]
    assert 20 * np.log10(np.sqrt(np.mean(inner**2)) / (0.5 / np.sqrt(2))) == pytest.approx(0.0, abs=0.01)
    # no resampling asked, or the same rate: the file's samples as they are
    assert load_recording(path, sample_rate=SR).sample_rate == SR


@pytest.mark.parametrize("fmt", ["FLAC", "OGG", "MP3"])
def test_compressed_formats(tmp_path, fmt) -> None:
    if fmt not in sf.available_formats():
        pytest.skip(f"this libsndfile ({sf.__libsndfile_version__}) does not read {fmt}")
    suffix = {"FLAC": ".flac", "OGG": ".ogg", "MP3": ".mp3"}[fmt]
    path = tmp_path / f"note{suffix}"
    sf.write(path, sine(440.0, 1.0, amp=0.4, sample_rate=48_000), 48_000, format=fmt)
    rec = load_recording(path)
    assert rec.file_rate == 48_000
    assert rec.duration_s == pytest.approx(1.0, abs=0.06)  # lossy codecs pad by a frame
    assert peak_hz(rec.samples[4800:-4800], 48_000) == pytest.approx(440.0, abs=0.5)
