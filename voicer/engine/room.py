"""The room effect plugin: convolution with a generated room response.

The impulse response (IR) is exponentially decaying Gaussian noise, the usual model of a
diffuse late reverberation (Moorer 1979, "About this reverberation business", Computer
Music Journal 3(2); from memory): ``predelay_ms`` of silence, then noise whose level
falls by 60 dB in ``rt60_s``. With high-frequency damping the noise is split into bands
(brick-wall masks on its spectrum, so the bands add up to the white noise): below
``damping_hz`` the decay is the given RT60, above it the RT60 falls in inverse
proportion to frequency, ``rt60(f) = rt60_s * damping_hz / f``, one rate per
third-octave band (taken at the band's geometric centre). The IR is normalised to unit
energy (sum of squares 1): for a stationary broadband input the wet signal has the
input's power, so the wet level is the same whatever the RT60. A single pure tone is
coloured as in a real room (the response's level at one frequency scatters about 0 dB);
the renderer's limiter follows the effects.

Convolution is uniformly partitioned overlap-save (Wefers 2015, "Partitioned
convolution algorithms for real-time auralization", thesis, RWTH Aachen: the
frequency-domain delay line), the partition ``B`` being the ``max_block`` given to
:meth:`RoomEffect.prepare` and the FFT size ``2B``. It adds **no latency**
(``latency_frames = 0``):

* the partitions after the first only need input blocks that are complete, so their
  sum is made once per block, when a block of input completes;
* the first partition needs the samples of the current block: if the pre-delay covers
  it (``predelay >= B`` samples, the first partition is zero, as with the default 10 ms
  at blocks up to 480 samples at 48 kHz) the whole wet block is known in advance and a
  call only copies it out; otherwise each call transforms the part of the current
  block received so far (zeros after it) and adds its product with the first partition.
  A call then costs one FFT pair of ``2B`` points whatever its length, so prepare with
  the block size the caller uses (the renderer's ``block``), not a larger one.

Calls of any size are buffered into partitions, so the output does not depend on how
the stream is cut: exactly the same bits when the pre-delay covers a partition, equal
to float rounding otherwise (a partly filled partition is transformed with zeros in
place of the samples still to come, which changes the rounding, not the result).

Real-time: :meth:`RoomEffect.prepare` allocates everything; :meth:`RoomEffect.process`
writes only into those buffers. numpy's FFT allocates a temporary of the transform's
size for float32 input (measured with tracemalloc: about 16 bytes per FFT point) and
none for float64, so the frames are float64 and the transforms complex128; the spectra
of the delay line are stored in complex64 (half the memory traffic of the partitions'
sum, the costly part). What is left is about 2 kB of Python objects per numpy call,
the same at every block size (tests/test_room.py measures it). A block holding a
non-finite sample resets the tail (counted in ``nonfinite_resets``) and is passed on
scaled by the dry gain only, so that the renderer's guard still sees the bad samples
and resets the voice that made them.
"""

from __future__ import annotations

__all__ = ["RoomEffect", "decaying_noise_ir", "DAMPING_BANDS_PER_OCTAVE"]

import math
import numbers

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError

#: Bands per octave above ``damping_hz`` (each with its own decay rate).
DAMPING_BANDS_PER_OCTAVE = 3
#: 60 dB of amplitude decay is a factor exp(-3 ln 10).
_LN_1000 = 3.0 * math.log(10.0)

# Allowed ranges (units in the names); the default settings suit a furnished room.
_RANGES = {
    "rt60_s": (0.1, 10.0),
    "predelay_ms": (0.0, 250.0),
    "damping_hz": (500.0, 20_000.0),
    "wet_mix": (0.0, 1.0),
    "length_s": (0.05, 10.0),
}


def _checked(name: str, value: object, *, optional: bool = False) -> float | None:
    """``value`` as a float within the range of ``name``, or a ParameterError saying why."""
    lo, hi = _RANGES[name]
    if value is None and optional:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ParameterError(f"room: {name}={value!r} must be a number in {lo:g}..{hi:g}"
                             + (" (or None: off)" if optional else ""))
    v = float(value)
    if not (math.isfinite(v) and lo <= v <= hi):
        raise ParameterError(f"room: {name}={value!r} is outside the allowed range {lo:g}..{hi:g}")
    return v


def decaying_noise_ir(sample_rate: float, *, rt60_s: float, predelay_ms: float = 0.0, length_s: float | None = None,
                      damping_hz: float | None = None, seed: int = 0) -> NDArray[np.float64]:
    """A room impulse response: pre-delay, then exponentially decaying noise; unit energy.

    Parameters
    ----------
    sample_rate : float > 0
        Samples per second.
    rt60_s : float > 0
        Time for the level to fall by 60 dB (below ``damping_hz`` when damping is on).
    predelay_ms : float >= 0
        Silence before the decay starts (the direct sound is the dry signal).
    length_s : float > 0, optional
        Length of the decay after the pre-delay; default ``rt60_s`` (the IR stops 60 dB
        down, where the rest of its energy is a millionth of the whole).
    damping_hz : float > 0, optional
        Above this frequency the RT60 falls as ``rt60_s * damping_hz / f`` (in
        third-octave steps); None: the same RT60 at every frequency.
    seed : int
        Seed of the noise (numpy's default Generator): the same seed, the same IR.

    Returns
    -------
    ndarray of float64
        ``round(predelay_ms * sample_rate / 1000) + round(length_s * sample_rate)`` taps,
        with ``sum(h**2) == 1``.
    """
    delay = int(round(predelay_ms * 1e-3 * sample_rate))
    n = max(1, int(round((rt60_s if length_s is None else length_s) * sample_rate)))
    t = np.arange(n) / sample_rate
    rate = _LN_1000 / rt60_s  # amplitude decay rate (1/s) below damping_hz
    noise = np.random.default_rng(seed).standard_normal(n)
    nyquist = 0.5 * sample_rate
    if damping_hz is None or damping_hz >= nyquist:
        decay = noise * np.exp(-rate * t)
    else:
        spectrum = np.fft.rfft(noise)
        freqs = np.fft.rfftfreq(n, 1.0 / sample_rate)
        step = 2.0 ** (1.0 / DAMPING_BANDS_PER_OCTAVE)
        edges = [0.0, damping_hz]
        while edges[-1] < nyquist:
            edges.append(edges[-1] * step)
        decay = np.zeros(n)
        for i, (lo, hi) in enumerate(zip(edges[:-1], edges[1:])):
            band = (freqs >= lo) & (freqs < hi) if hi < edges[-1] else freqs >= lo
            if not band.any():
                continue
            factor = 1.0 if i == 0 else math.sqrt(lo * hi) / damping_hz  # rate grows with f
            decay += np.fft.irfft(np.where(band, spectrum, 0.0), n=n) * np.exp(-rate * factor * t)
    h = np.concatenate([np.zeros(delay), decay])
    return h / math.sqrt(float(np.dot(h, h)))


class RoomEffect:
    """Room reverberation by partitioned convolution (``voicer.effects`` plugin "room").

    Parameters
    ----------
    rt60_s : float in 0.1..10
        Reverberation time: the tail falls by 60 dB in this time (below ``damping_hz``).
    predelay_ms : float in 0..250
        Gap between the dry sound and the start of the tail.
    damping_hz : float in 500..20000, or None
        Above this frequency the tail dies faster (RT60 inversely proportional to
        frequency); None for no damping.
    wet_mix : float in 0..1
        Output = ``(1 - wet_mix) * dry + wet_mix * wet``, the wet being the input
        convolved with the unit-energy IR. The dry path is the input sample itself,
        only scaled (exactly the input at ``wet_mix = 0``).
    length_s : float in 0.05..10, or None
        Length of the tail after the pre-delay; default ``rt60_s``. Cost grows with it.
    seed : int >= 0
        Seed of the IR's noise (reproducible rooms).

    Attributes
    ----------
    impulse_response : ndarray of float64
        The unit-energy IR (after :meth:`prepare`), without the wet gain.
    nonfinite_resets : int
        Blocks with non-finite input, each of which reset the tail.
    """

    name = "room"
    latency_frames = 0

    def __init__(self, *, rt60_s: float = 1.0, predelay_ms: float = 10.0, damping_hz: float | None = 4000.0,
                 wet_mix: float = 0.25, length_s: float | None = None, seed: int = 0) -> None:
        self.rt60_s = _checked("rt60_s", rt60_s)
        self.predelay_ms = _checked("predelay_ms", predelay_ms)
        self.damping_hz = _checked("damping_hz", damping_hz, optional=True)
        self.wet_mix = _checked("wet_mix", wet_mix)
        self.length_s = _checked("length_s", length_s, optional=True)
        if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
            raise ParameterError(f"room: seed={seed!r} must be a whole number >= 0")
        self.seed = int(seed)
        self.impulse_response: NDArray[np.float64] = np.zeros(0)
        self.nonfinite_resets = 0
        self._prepared = False

    # --- set-up (off the audio thread) -------------------------------------------

    def prepare(self, sample_rate: float, max_block: int, channels: int) -> None:
        """Generate the IR and allocate every buffer; the partition is ``max_block``."""
        if not (isinstance(sample_rate, numbers.Real) and math.isfinite(sample_rate) and sample_rate > 0):
            raise ParameterError(f"room: sample_rate={sample_rate!r} must be a positive number of Hz")
        for label, value in (("max_block", max_block), ("channels", channels)):
            if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 1:
                raise ParameterError(f"room: {label}={value!r} must be a whole number >= 1")
        h = decaying_noise_ir(float(sample_rate), rt60_s=self.rt60_s, predelay_ms=self.predelay_ms,
                              length_s=self.length_s, damping_hz=self.damping_hz, seed=self.seed)
        self.impulse_response = h
        self.sample_rate = float(sample_rate)
        b, c = int(max_block), int(channels)
        fft_n, bins = 2 * b, b + 1
        parts = -(-len(h) // b)
        padded = np.zeros(parts * b)
        padded[: len(h)] = h * self.wet_mix  # the wet gain rides in the spectra
        spectra = np.fft.rfft(padded.reshape(parts, b), n=fft_n, axis=-1)  # (parts, bins)
        self._b, self._n, self._q = b, fft_n, parts - 1
        self._dry = np.float32(1.0 - self.wet_mix)
        self._head = bool(np.any(h[:b]))  # False: the pre-delay covers the first partition
        self._h0 = spectra[0].copy()
        # The later partitions newest-last, each bin's partitions contiguous, for one
        # batched (1, Q) @ (Q, 1) product per bin: _hrev[k, q] = H_{Q - q}[k].
        self._hrev = np.ascontiguousarray(spectra[:0:-1].T, dtype=np.complex64)[:, :, None]
        # The delay line of input spectra, stored twice (slots w and w + Q) so that the
        # last Q always lie in one contiguous window.
        self._fdl = np.zeros((c, bins, 2 * self._q), dtype=np.complex64)
        self._acc32 = np.zeros((c, bins, 1, 1), dtype=np.complex64)
        self._acc = np.zeros((c, bins), dtype=np.complex128)
        self._frame = np.zeros((c, fft_n))  # previous block, then the current one
        self._x = np.zeros((c, bins), dtype=np.complex128)
        self._y = np.zeros((c, bins), dtype=np.complex128)
        self._wet = np.zeros((c, fft_n))  # its second half: the current block's wet
        self._wet32 = np.zeros((c, b), dtype=np.float32)
        self._w = 0
        self._pos = 0  # samples of the current block received
        self._prepared = True

    @property
    def partitions(self) -> int:
        """Partitions of ``max_block`` samples the IR is cut into (0 before prepare)."""
        return self._q + 1 if self._prepared else 0

    # --- the audio thread ----------------------------------------------------------

    def reset(self) -> None:
        """Silence the tail and forget the input (no allocation: safe in the callback)."""
        if not self._prepared:
            return
        for buf in (self._fdl, self._acc32, self._acc, self._frame, self._wet):
            buf.fill(0)
        self._w = self._pos = 0

    def process(self, block: NDArray[np.float32]) -> None:
        """Mix the room into ``block`` (channels, frames) in place; any number of frames.

        Real-time safe; passes the block through unchanged before :meth:`prepare`.
        """
        if not self._prepared:
            return
        if not math.isfinite(float(block.sum())):  # a scalar: no array allocated
            self.reset()
            self.nonfinite_resets += 1
            block *= self._dry  # the bad samples stay for the renderer's guard
            return
        b, frames = self._b, block.shape[1]
        done = 0
        while done < frames:
            pos = self._pos
            m = min(frames - done, b - pos)
            seg = block[:, done:done + m]
            np.copyto(self._frame[:, b + pos:b + pos + m], seg)
            if self._head:  # the first partition, from the part of this block received so far
                np.fft.rfft(self._frame, axis=-1, out=self._x)
                np.multiply(self._x, self._h0, out=self._y)
                np.add(self._y, self._acc, out=self._y)
                np.fft.irfft(self._y, n=self._n, axis=-1, out=self._wet)
            wet = self._wet32[:, :m]
            np.copyto(wet, self._wet[:, b + pos:b + pos + m])
            seg *= self._dry
            seg += wet
            done += m
            self._pos = pos + m
            if self._pos == b:
                self._complete_block()

    def _complete_block(self) -> None:
        """A block of input is complete: into the delay line; the later partitions' sum
        for the next block (and, without a first partition, that block's whole wet)."""
        b, q = self._b, self._q
        if not self._head:  # otherwise the last call transformed the complete frame
            np.fft.rfft(self._frame, axis=-1, out=self._x)
        if q:
            w = self._w = (self._w + 1) % q
            self._fdl[:, :, w] = self._x
            self._fdl[:, :, w + q] = self._x
            np.matmul(self._fdl[:, :, None, w + 1:w + 1 + q], self._hrev, out=self._acc32)
            np.copyto(self._acc, self._acc32[:, :, 0, 0])
        if not self._head:
            np.fft.irfft(self._acc, n=self._n, axis=-1, out=self._wet)
        self._frame[:, :b] = self._frame[:, b:]
        self._frame[:, b:] = 0.0
        self._pos = 0
