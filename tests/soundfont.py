"""Samples of one preset of a SoundFont 2 file: a test fixture reading an open dataset.

Not part of voicer. The tests check the recording analysis against real piano notes:
the sampled acoustic piano of Debian's package ``fluid-soundfont-gm`` (FluidR3_GM.sf2,
bank 0 program 0). The file format is published: "SoundFont Technical Specification
2.04", E-mu Systems / Creative Technology (1996-2006), cited below as "SF2.04 s. x".

A RIFF form ``sfbk`` holds LIST ``INFO`` (version ``ifil``), LIST ``sdta`` (``smpl``:
16-bit samples; optional ``sm24``: their low bytes) and LIST ``pdta``: presets
(phdr/pbag/pgen), instruments (inst/ibag/igen) and sample headers (shdr). A preset's
zones name an instrument (generator 41), an instrument's zones name a sample
(generator 53); both levels may carry key and velocity ranges and tuning.
"""

from __future__ import annotations

import functools
import os
import struct
from dataclasses import dataclass, replace
from pathlib import Path
from typing import BinaryIO

import numpy as np
from numpy.typing import NDArray

from needs import skip_or_fail

__all__ = [
    "SF2_PATH",
    "INSTALL_HINT",
    "Sample",
    "SoundFontError",
    "read_preset_samples",
    "fluid_piano_samples",
    "skip_or_fail_without_dataset",
]

SF2_PATH = Path("/usr/share/sounds/sf2/FluidR3_GM.sf2")
INSTALL_HINT = "install the Debian package fluid-soundfont-gm (apt-get install fluid-soundfont-gm)"

# Generator operators (SF2.04 s. 8.1.2, 8.1.3).
_START_OFFSET, _END_OFFSET, _START_COARSE_OFFSET, _END_COARSE_OFFSET = 0, 1, 4, 12
_INSTRUMENT, _KEY_RANGE, _VEL_RANGE = 41, 43, 44
_COARSE_TUNE, _FINE_TUNE, _SAMPLE_ID, _ROOT_KEY = 51, 52, 53, 58
# sfSampleType bits (SF2.04 s. 7.10).
_RIGHT, _LEFT, _ROM = 2, 4, 0x8000
_FULL_RANGE = (0, 127)
_CHANNELS = {"mix": slice(None), "left": slice(0, 1), "right": slice(-1, None)}  # of a (left, right) group

# pdta records (SF2.04 s. 7.2-7.10): struct format per sub-chunk, in the required order.
_RECORDS = {
    "phdr": "<20sHHHIII", "pbag": "<HH", "pmod": "<HHhHH", "pgen": "<H2s",
    "inst": "<20sH", "ibag": "<HH", "imod": "<HHhHH", "igen": "<H2s",
    "shdr": "<20sIIIIIBbHH",
}


class SoundFontError(ValueError):
    """A SoundFont file is malformed or lacks what was asked for; the message names the file."""


@dataclass(frozen=True)
class Sample:
    """One sampled note of a preset, as its instrument zone plays it.

    Attributes
    ----------
    name : str
        Sample name from the sample header (``"L+R"`` names for a mixed stereo pair).
    root_key : int in 0..127
        MIDI key at which the sample sounds at its recorded pitch: the instrument zone's
        overridingRootKey (generator 58) if set, else the header's byOriginalPitch.
    pitch_correction_cents : int
        Cents to add to the recorded pitch to reach the root key's intended pitch: the
        header's chPitchCorrection plus 100 coarseTune + fineTune (generators 51, 52) of
        the instrument zone and of the preset zone (the two levels add, SF2.04 s. 9.4).
        The recording is thus expected at ET(root_key) - pitch_correction_cents.
    sample_rate : int > 0
        Sample rate of the data in Hz.
    data : ndarray of float64, shape (frames,)
        Mono samples in [-1, 1) from the zone's start to its end (loop points ignored).
    key_range, velocity_range : (int, int)
        Ranges (inclusive) over which the preset plays this sample: the instrument zone's
        ranges intersected with the preset zone's (generators 43, 44).
    """

    name: str
    root_key: int
    pitch_correction_cents: int
    sample_rate: int
    data: NDArray[np.float64]
    key_range: tuple[int, int]
    velocity_range: tuple[int, int]


@dataclass(frozen=True)
class _Header:
    name: str
    start: int
    end: int
    sample_rate: int
    original_pitch: int
    correction_cents: int
    link: int
    kind: int


@dataclass(frozen=True)
class _Zone:
    sample: int
    start: int
    end: int
    root_key: int
    cents: int
    key_range: tuple[int, int]
    velocity_range: tuple[int, int]


def read_preset_samples(path: Path, *, bank: int = 0, program: int = 0, channel: str = "mix") -> list[Sample]:
    """Read the samples that one preset of a SoundFont 2 file plays, one per recorded note.

    Zones that play the same sample data alike over touching velocity ranges are merged
    (velocity_range is their hull). A left and a right channel (sfSampleType, SF2.04
    s. 7.10) played by two zones with the same ranges, root key, tuning and rate become
    one sample: by default the mean of the two channels over their common length, a
    mono mixdown as of a recording (``channel="left"`` or ``"right"`` takes one channel
    instead). A channel played without a partner is returned alone. Envelopes,
    filters, pan and loops of the zones are not applied: the data are the recording.

    Parameters
    ----------
    path : Path
        The .sf2 file.
    bank, program : int in 0..127
        MIDI bank and program number of the preset (phdr wBank, wPreset).
    channel : {"mix", "left", "right"}
        What becomes of a stereo pair: the mean of both channels, or one of them.

    Returns
    -------
    list of Sample
        Sorted by root key, then velocity and key range.

    Raises
    ------
    SoundFontError
        If the file is not a SoundFont 2 file, is truncated or inconsistent, or has no
        such preset.
    ValueError
        If channel is not one of the three.
    """
    if channel not in _CHANNELS:
        raise ValueError(f"channel={channel!r} must be one of {', '.join(_CHANNELS)}")
    path = Path(path)
    with path.open("rb") as f:
        pdta, smpl, sm24 = _read_structure(f, path)
        zones = _preset_zones(pdta, path, bank, program)
        headers = pdta["shdr"]
        samples = []
        for group in _stereo_groups(_merge_velocity_layers(zones), headers):
            group = group[_CHANNELS[channel]]
            channels = [_read_data(f, path, smpl, sm24, headers[z.sample], z) for z in group]
            frames = min(len(c) for c in channels)
            data = np.mean([c[:frames] for c in channels], axis=0)
            data.setflags(write=False)  # shared by the tests through the session cache
            first = group[0]
            samples.append(Sample(
                name="+".join(headers[z.sample].name for z in group), root_key=first.root_key,
                pitch_correction_cents=first.cents, sample_rate=headers[first.sample].sample_rate,
                data=data, key_range=first.key_range,
                velocity_range=first.velocity_range))
    return sorted(samples, key=lambda s: (s.root_key, s.velocity_range, s.key_range, s.name))


def _read_structure(f: BinaryIO, path: Path) -> tuple[dict[str, list], tuple[int, int], tuple[int, int] | None]:
    """The pdta records, and (offset, frames) of smpl and of a usable sm24 (or None)."""
    head = f.read(12)
    if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"sfbk":
        raise SoundFontError(f"{path}: not a SoundFont 2 file (no RIFF 'sfbk' header)")
    riff_end = 8 + struct.unpack_from("<I", head, 4)[0]
    size = f.seek(0, os.SEEK_END)
    if riff_end > size:
        raise SoundFontError(f"{path}: truncated: the RIFF form claims {riff_end} bytes, the file has {size}")
    top = _list_chunks(f, path, 12, riff_end)
    for name in ("INFO", "sdta", "pdta"):
        if name not in top:
            raise SoundFontError(f"{path}: LIST '{name}' is missing")
    info = _list_chunks(f, path, *_span(top["INFO"]))
    sdta = _list_chunks(f, path, *_span(top["sdta"]))
    pdta_chunks = _list_chunks(f, path, *_span(top["pdta"]))
    if "smpl" not in sdta:
        raise SoundFontError(f"{path}: LIST 'sdta' has no 'smpl' chunk")
    smpl = (sdta["smpl"][0], sdta["smpl"][1] // 2)
    version = (0, 0)
    if "ifil" in info and info["ifil"][1] >= 4:
        f.seek(info["ifil"][0])
        version = struct.unpack("<HH", f.read(4))
    # sm24 counts only from version 2.04 on and at half the size of smpl (SF2.04 s. 6.2).
    sm24 = None
    if "sm24" in sdta and version >= (2, 4) and sdta["sm24"][1] in (smpl[1], smpl[1] + smpl[1] % 2):
        sm24 = (sdta["sm24"][0], smpl[1])
    pdta = {}
    for name, fmt in _RECORDS.items():
        if name not in pdta_chunks:
            raise SoundFontError(f"{path}: LIST 'pdta' has no '{name}' chunk")
        offset, length = pdta_chunks[name]
        record = struct.calcsize(fmt)
        if length % record or length < record:
            raise SoundFontError(f"{path}: '{name}' holds {length} bytes, not a whole number of {record}-byte records")
        f.seek(offset)
        pdta[name] = list(struct.iter_unpack(fmt, f.read(length)))
    pdta["shdr"] = [_Header(_text(r[0]), r[1], r[2], r[5], r[6], r[7], r[8], r[9]) for r in pdta["shdr"][:-1]]
    return pdta, smpl, sm24


def _span(chunk: tuple[int, int]) -> tuple[int, int]:
    return chunk[0], chunk[0] + chunk[1]


def _list_chunks(f: BinaryIO, path: Path, start: int, end: int) -> dict[str, tuple[int, int]]:
    """Sub-chunks between byte offsets start and end: id (a LIST's type) -> (data offset, size)."""
    chunks = {}
    pos = start
    while pos + 8 <= end:
        f.seek(pos)
        ident, size = struct.unpack("<4sI", f.read(8))
        if pos + 8 + size > end:
            raise SoundFontError(f"{path}: chunk {_text(ident)!r} at byte {pos} runs past the end of its list")
        if ident == b"LIST":
            chunks[_text(f.read(4))] = (pos + 12, size - 4)
        else:
            chunks[_text(ident)] = (pos + 8, size)
        pos += 8 + size + size % 2  # RIFF chunks are padded to even sizes
    return chunks


def _text(raw: bytes) -> str:
    return raw.split(b"\0", 1)[0].decode("latin-1").strip()


def _zones(path: Path, bags: list, gens: list, first: int, end: int, terminal: int) -> list[dict[int, bytes]]:
    """Generators of bags first..end-1, global zone merged into each local one (SF2.04 s. 7.3, 7.7).

    A first zone without the terminal generator is the global zone; a later one is ignored.
    Within a zone, a repeated generator counts once, its last value.
    """
    if not (first <= end < len(bags) and bags[end][0] <= len(gens)):
        raise SoundFontError(f"{path}: zones {first}..{end} or their generators lie outside the file's tables")
    zones = [dict(gens[bags[b][0]:bags[b + 1][0]]) for b in range(first, end)]
    common = zones.pop(0) if zones and terminal not in zones[0] else {}
    return [{**common, **z} for z in zones if terminal in z]


def _signed(zone: dict[int, bytes], oper: int) -> int:
    return int.from_bytes(zone.get(oper, b"\0\0"), "little", signed=True)


def _unsigned(zone: dict[int, bytes], oper: int) -> int:
    return int.from_bytes(zone[oper], "little")


def _range(zone: dict[int, bytes], oper: int) -> tuple[int, int]:
    raw = zone.get(oper)
    return (raw[0], raw[1]) if raw is not None else _FULL_RANGE


def _intersect(a: tuple[int, int], b: tuple[int, int]) -> tuple[int, int]:
    return max(a[0], b[0]), min(a[1], b[1])


def _preset_zones(pdta: dict[str, list], path: Path, bank: int, program: int) -> list[_Zone]:
    """The instrument zones that the preset plays, with preset-level ranges and tuning applied."""
    phdr, inst, headers = pdta["phdr"], pdta["inst"], pdta["shdr"]
    found = [i for i, p in enumerate(phdr[:-1]) if (p[2], p[1]) == (bank, program)]
    if not found:
        raise SoundFontError(f"{path}: no preset at bank {bank} program {program}")
    i = found[0]
    zones = []
    for pz in _zones(path, pdta["pbag"], pdta["pgen"], phdr[i][3], phdr[i + 1][3], _INSTRUMENT):
        k = _unsigned(pz, _INSTRUMENT)
        if k >= len(inst) - 1:
            raise SoundFontError(f"{path}: preset {_text(phdr[i][0])!r} names instrument {k}, "
                                 f"the file has 0..{len(inst) - 2}")
        preset_cents = 100 * _signed(pz, _COARSE_TUNE) + _signed(pz, _FINE_TUNE)
        for iz in _zones(path, pdta["ibag"], pdta["igen"], inst[k][1], inst[k + 1][1], _SAMPLE_ID):
            s = _unsigned(iz, _SAMPLE_ID)
            if s >= len(headers):
                raise SoundFontError(f"{path}: instrument {_text(inst[k][0])!r} names sample {s}, "
                                     f"the file has 0..{len(headers) - 1}")
            keys = _intersect(_range(pz, _KEY_RANGE), _range(iz, _KEY_RANGE))
            velocities = _intersect(_range(pz, _VEL_RANGE), _range(iz, _VEL_RANGE))
            if keys[0] > keys[1] or velocities[0] > velocities[1]:
                continue  # the preset zone never plays this instrument zone
            h = headers[s]
            root = _signed(iz, _ROOT_KEY) if _ROOT_KEY in iz else -1
            if not 0 <= root <= 127:  # -1: not overridden; 255 in the header: unpitched -> 60 (SF2.04 s. 7.10)
                root = h.original_pitch if h.original_pitch <= 127 else 60
            zones.append(_Zone(
                sample=s,
                start=h.start + _signed(iz, _START_OFFSET) + 32768 * _signed(iz, _START_COARSE_OFFSET),
                end=h.end + _signed(iz, _END_OFFSET) + 32768 * _signed(iz, _END_COARSE_OFFSET),
                root_key=root,
                cents=h.correction_cents + 100 * _signed(iz, _COARSE_TUNE) + _signed(iz, _FINE_TUNE) + preset_cents,
                key_range=keys, velocity_range=velocities))
    return zones


def _merge_velocity_layers(zones: list[_Zone]) -> list[_Zone]:
    """Zones that differ only in touching velocity ranges, as one zone over their hull.

    FluidR3_GM's piano splits velocity into 9 preset zones that differ only in their
    release time, each playing the same instrument: the same recordings 9 times.
    """
    merged: list[_Zone] = []
    for z in zones:
        for n, m in enumerate(merged):
            lo, hi = m.velocity_range
            if (m.sample, m.start, m.end, m.root_key, m.cents, m.key_range) == (
                    z.sample, z.start, z.end, z.root_key, z.cents, z.key_range) \
                    and z.velocity_range[0] <= hi + 1 and lo <= z.velocity_range[1] + 1:
                merged[n] = replace(m, velocity_range=(min(lo, z.velocity_range[0]), max(hi, z.velocity_range[1])))
                break
        else:
            merged.append(z)
    return merged


def _stereo_groups(zones: list[_Zone], headers: list[_Header]) -> list[tuple[_Zone, ...]]:
    """Zones grouped into notes: a left and a right channel played alike form one group, left first.

    The partner is the linked sample (wSampleLink) if it is played alike, else the first
    unpaired opposite channel played alike: FluidR3_GM.sf2 leaves every wSampleLink at 0.
    """
    def note(z: _Zone) -> tuple:
        return z.root_key, z.cents, z.key_range, z.velocity_range, headers[z.sample].sample_rate

    def side(z: _Zone) -> int:
        return headers[z.sample].kind & (_LEFT | _RIGHT)

    taken: set[int] = set()
    groups = []
    for n, z in enumerate(zones):
        if n in taken:
            continue
        taken.add(n)
        other = {_LEFT: _RIGHT, _RIGHT: _LEFT}.get(side(z))
        mates = [m for m, w in enumerate(zones) if m not in taken and side(w) == other and note(w) == note(z)]
        mates.sort(key=lambda m: zones[m].sample != headers[z.sample].link)  # the linked partner first
        if mates:
            taken.add(mates[0])
            groups.append((z, zones[mates[0]]) if side(z) == _LEFT else (zones[mates[0]], z))
        else:
            groups.append((z,))
    return groups


def _read_data(f: BinaryIO, path: Path, smpl: tuple[int, int], sm24: tuple[int, int] | None,
               h: _Header, z: _Zone) -> NDArray[np.float64]:
    """Samples start..end of a zone scaled to [-1, 1): 16 bits, or 24 with the sm24 low bytes."""
    if h.kind & _ROM:
        raise SoundFontError(f"{path}: sample {h.name!r} lives in a synthesizer's ROM, not in the file")
    if not 0 <= z.start < z.end <= smpl[1]:
        raise SoundFontError(f"{path}: sample {h.name!r} spans points {z.start}..{z.end}, "
                             f"the 'smpl' chunk holds 0..{smpl[1]}")
    frames = z.end - z.start
    f.seek(smpl[0] + 2 * z.start)
    high = np.frombuffer(f.read(2 * frames), dtype="<i2").astype(np.float64)
    if sm24 is None:
        return high / 32768.0
    f.seek(sm24[0] + z.start)
    low = np.frombuffer(f.read(frames), dtype=np.uint8)
    return (high * 256.0 + low) / 8_388_608.0


def skip_or_fail_without_dataset(path: Path = SF2_PATH) -> None:
    """Fail (on CI) or skip (elsewhere) the calling test when the SoundFont is missing.

    CI is recognised by the environment variable CI being set or VOICER_DATASETS=required
    (which .ci/run sets): there a missing dataset is an error, never a silent skip.
    """
    if path.is_file():
        return
    skip_or_fail(f"open dataset {path} is missing: {INSTALL_HINT}")


def fluid_piano_samples(channel: str = "mix") -> list[Sample]:
    """The samples of FluidR3_GM.sf2 bank 0 program 0 (read once per test session).

    Calls :func:`skip_or_fail_without_dataset` first, so a test or fixture can use it
    alone. ``channel`` as in :func:`read_preset_samples`.
    """
    skip_or_fail_without_dataset()
    return _fluid_piano_samples(channel)


@functools.cache
def _fluid_piano_samples(channel: str) -> list[Sample]:
    return read_preset_samples(SF2_PATH, bank=0, program=0, channel=channel)
