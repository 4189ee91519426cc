"""The SoundFont 2 reader of the test fixtures (tests/soundfont.py).

Source of the format: "SoundFont Technical Specification 2.04", E-mu Systems / Creative
Technology (1996-2006), "SF2.04 s. x" below. Small files are written here with struct,
independently of the reader, and read back exactly; then the open dataset (Debian's
fluid-soundfont-gm) is read and checked for what the recording tests rely on.
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from soundfont import Sample, SoundFontError, fluid_piano_samples, read_preset_samples, \
    skip_or_fail_without_dataset

# Generator operators and sample types (SF2.04 s. 8.1.2, 7.10).
KEY_RANGE, VEL_RANGE, INSTRUMENT, COARSE_TUNE, FINE_TUNE, SAMPLE_ID, ROOT_KEY = 43, 44, 41, 51, 52, 53, 58
START_OFFSET, END_OFFSET = 0, 1
MONO, RIGHT, LEFT = 1, 2, 4


# --- a SoundFont 2 writer (SF2.04 s. 4-7) ------------------------------------------------

def _chunk(ident: bytes, payload: bytes) -> bytes:
    return ident + struct.pack("<I", len(payload)) + payload + b"\0" * (len(payload) % 2)


def _list(kind: bytes, *chunks: bytes) -> bytes:
    return _chunk(b"LIST", kind + b"".join(chunks))


def gen(oper: int, amount: int | tuple[int, int]) -> tuple[int, bytes]:
    """A generator: ranges are (lo, hi) bytes, other amounts a signed 16-bit word."""
    raw = bytes(amount) if isinstance(amount, tuple) else struct.pack("<h", amount)
    return oper, raw


def _zones(zones: list[list[tuple[int, bytes]]], bags: list[bytes], gens: list[bytes]) -> int:
    """Appends bag and generator records; returns the index of the first bag."""
    first = len(bags)
    for zone in zones:
        bags.append(struct.pack("<HH", len(gens), 0))
        gens.extend(struct.pack("<H2s", oper, raw) for oper, raw in zone)
    return first


def write_sf2(path: Path, *, samples: list[dict], instruments: list[list], presets: list[dict],
              version: tuple[int, int] = (2, 1), low_bytes: bool = False) -> None:
    """Writes a SoundFont 2 file.

    samples: dicts of name, data (int16), rate, pitch, correction, kind (default mono),
    link (default 0), low (uint8, the sm24 bytes when low_bytes). instruments: zone lists
    of generators. presets: dicts of name, bank, program, zones.
    """
    smpl, sm24, shdr = b"", b"", b""
    for s in samples:
        start = len(smpl) // 2
        smpl += np.asarray(s["data"], dtype="<i2").tobytes() + b"\0" * 92  # 46 zero points after each (SF2.04 s. 6.1)
        sm24 += np.asarray(s.get("low", np.zeros(len(s["data"]))), dtype=np.uint8).tobytes() + b"\0" * 46
        end = start + len(s["data"])
        shdr += struct.pack("<20sIIIIIBbHH", s["name"].encode(), start, end, start + 1, end - 1, s["rate"],
                            s["pitch"], s["correction"], s.get("link", 0), s.get("kind", MONO))
    shdr += struct.pack("<20sIIIIIBbHH", b"EOS", 0, 0, 0, 0, 0, 0, 0, 0, 0)
    ibag, igen, inst = [], [], b""
    for n, zones in enumerate(instruments):
        inst += struct.pack("<20sH", f"instrument {n}".encode(), _zones(zones, ibag, igen))
    inst += struct.pack("<20sH", b"EOI", len(ibag))
    pbag, pgen, phdr = [], [], b""
    for p in presets:
        phdr += struct.pack("<20sHHHIII", p["name"].encode(), p["program"], p["bank"],
                            _zones(p["zones"], pbag, pgen), 0, 0, 0)
    phdr += struct.pack("<20sHHHIII", b"EOP", 0, 0, len(pbag), 0, 0, 0)
    terminal_bag, terminal_gen, terminal_mod = struct.pack("<HH", len(pgen), 0), b"\0" * 4, b"\0" * 10
    sdta = [_chunk(b"smpl", smpl)] + ([_chunk(b"sm24", sm24)] if low_bytes else [])
    body = b"sfbk" + _list(b"INFO", _chunk(b"ifil", struct.pack("<HH", *version)), _chunk(b"INAM", b"test\0\0")) \
        + _list(b"sdta", *sdta) + _list(
            b"pdta", _chunk(b"phdr", phdr), _chunk(b"pbag", b"".join(pbag) + terminal_bag),
            _chunk(b"pmod", terminal_mod), _chunk(b"pgen", b"".join(pgen) + terminal_gen), _chunk(b"inst", inst),
            _chunk(b"ibag", b"".join(ibag) + struct.pack("<HH", len(igen), 0)), _chunk(b"imod", terminal_mod),
            _chunk(b"igen", b"".join(igen) + terminal_gen), _chunk(b"shdr", shdr))
    path.write_bytes(_chunk(b"RIFF", body))


def _ramp(n: int, scale: int) -> np.ndarray:
    return (np.arange(n) * scale % 65536 - 32768).astype(np.int16)


LOW = dict(name="low C", data=_ramp(100, 655), rate=44_100, pitch=48, correction=5)
HIGH = dict(name="high E", data=_ramp(80, -977), rate=22_050, pitch=60, correction=-3)


def _piano(tmp_path: Path, **kwargs) -> Path:
    """One preset, one instrument: a global zone, low C on keys 0..59, high E on 60..127
    with its root key overridden to 76 and a fine tune of +7 cents."""
    path = tmp_path / "tiny.sf2"
    instrument = [[gen(VEL_RANGE, (10, 127))],  # global zone: no sampleID
                  [gen(KEY_RANGE, (0, 59)), gen(SAMPLE_ID, 0)],
                  [gen(KEY_RANGE, (60, 127)), gen(ROOT_KEY, 76), gen(FINE_TUNE, 7), gen(SAMPLE_ID, 1)]]
    presets = [dict(name="other", bank=0, program=1, zones=[[gen(INSTRUMENT, 0)]]),
               dict(name="tiny piano", bank=0, program=0,
                    zones=[[gen(KEY_RANGE, (21, 108)), gen(COARSE_TUNE, -1), gen(INSTRUMENT, 0)]])]
    write_sf2(path, samples=[LOW, HIGH], instruments=[instrument], presets=presets, **kwargs)
    return path


# --- the reader on files written here -------------------------------------------------------

def test_tiny_file_is_read_back_exactly(tmp_path):
    low, high = read_preset_samples(_piano(tmp_path))
    assert (low.name, low.sample_rate, low.root_key, high.name, high.sample_rate, high.root_key) == (
        "low C", 44_100, 48, "high E", 22_050, 76)  # 76: overridingRootKey beats byOriginalPitch (SF2.04 s. 8.1.2)
    # Ranges: instrument zone intersected with the preset zone; the global velRange applies to every zone.
    assert (low.key_range, high.key_range) == ((21, 59), (60, 108))
    assert low.velocity_range == high.velocity_range == (10, 127)
    # Tuning adds over the levels: header correction + instrument fineTune + preset coarseTune (SF2.04 s. 9.4).
    assert (low.pitch_correction_cents, high.pitch_correction_cents) == (5 - 100, -3 + 7 - 100)
    # 16-bit points scaled by 2**-15 (exact in float64).
    np.testing.assert_array_equal(low.data, LOW["data"] / 32768.0)
    np.testing.assert_array_equal(high.data, HIGH["data"] / 32768.0)
    assert low.data.dtype == np.float64 and not low.data.flags.writeable


def test_other_preset_and_missing_preset(tmp_path):
    path = _piano(tmp_path)
    assert [s.key_range for s in read_preset_samples(path, program=1)] == [(0, 59), (60, 127)]
    with pytest.raises(SoundFontError, match=r"tiny\.sf2: no preset at bank 0 program 5"):
        read_preset_samples(path, program=5)


def test_24_bit_samples_from_version_2_04_on(tmp_path):
    # sm24 holds the low byte of each point (SF2.04 s. 6.2); below version 2.04 it is ignored.
    low_bytes = np.arange(100, dtype=np.uint8) * 2 + 1
    sample = dict(LOW, low=low_bytes)
    instrument = [[gen(SAMPLE_ID, 0)]]  # one zone
    preset = [dict(name="p", bank=0, program=0, zones=[[gen(INSTRUMENT, 0)]])]
    new, old = tmp_path / "new.sf2", tmp_path / "old.sf2"
    write_sf2(new, samples=[sample], instruments=[instrument], presets=preset, version=(2, 4), low_bytes=True)
    write_sf2(old, samples=[sample], instruments=[instrument], presets=preset, version=(2, 1), low_bytes=True)
    expected = (LOW["data"].astype(np.int64) * 256 + low_bytes) / 2.0**23
    np.testing.assert_array_equal(read_preset_samples(new)[0].data, expected)
    np.testing.assert_array_equal(read_preset_samples(old)[0].data, LOW["data"] / 32768.0)


def test_address_offsets_trim_the_sample(tmp_path):
    path = tmp_path / "trim.sf2"
    write_sf2(path, samples=[LOW], instruments=[[[gen(START_OFFSET, 10), gen(END_OFFSET, -20), gen(SAMPLE_ID, 0)]]],
              presets=[dict(name="p", bank=0, program=0, zones=[[gen(INSTRUMENT, 0)]])])
    np.testing.assert_array_equal(read_preset_samples(path)[0].data, LOW["data"][10:80] / 32768.0)


def _stereo(tmp_path: Path, link: int) -> Path:
    """A left/right pair (right first in the file) over two velocity layers of the preset."""
    right = dict(LOW, name="note R", kind=RIGHT, link=link)
    left = dict(LOW, name="note L", data=_ramp(100, 311), kind=LEFT, link=link ^ 1)
    path = tmp_path / "stereo.sf2"
    layers = [[gen(VEL_RANGE, (0, 63)), gen(INSTRUMENT, 0)], [gen(VEL_RANGE, (64, 127)), gen(INSTRUMENT, 0)]]
    write_sf2(path, samples=[right, left], instruments=[[[gen(SAMPLE_ID, 0)], [gen(SAMPLE_ID, 1)]]],
              presets=[dict(name="p", bank=0, program=0, zones=layers)])
    return path


@pytest.mark.parametrize("link", [1, 0], ids=["linked", "unlinked like FluidR3"])
def test_stereo_pair_is_one_note_over_the_velocity_layers(tmp_path, link):
    # link 0 points the right channel at itself: FluidR3_GM.sf2 leaves every wSampleLink at 0.
    path = _stereo(tmp_path, link)
    (mixed,) = read_preset_samples(path)
    left = _ramp(100, 311) / 32768.0
    right = LOW["data"] / 32768.0
    assert (mixed.name, mixed.velocity_range, mixed.root_key) == ("note L+note R", (0, 127), 48)
    np.testing.assert_allclose(mixed.data, (left + right) / 2, rtol=0, atol=1e-17)  # one rounding of the mean
    np.testing.assert_array_equal(read_preset_samples(path, channel="left")[0].data, left)
    np.testing.assert_array_equal(read_preset_samples(path, channel="right")[0].data, right)
    with pytest.raises(ValueError, match="channel='both' must be one of mix, left, right"):
        read_preset_samples(path, channel="both")


def test_bad_files_name_the_file(tmp_path):
    text = tmp_path / "notes.sf2"
    text.write_text("not a soundfont")
    with pytest.raises(SoundFontError, match=r"notes\.sf2: not a SoundFont 2 file"):
        read_preset_samples(text)
    cut = tmp_path / "cut.sf2"
    cut.write_bytes(_piano(tmp_path).read_bytes()[:-50])
    with pytest.raises(SoundFontError, match=r"cut\.sf2: truncated"):
        read_preset_samples(cut)


def test_missing_dataset_fails_on_ci_and_skips_elsewhere(tmp_path, monkeypatch):
    missing = tmp_path / "FluidR3_GM.sf2"
    monkeypatch.delenv("CI", raising=False)
    monkeypatch.delenv("VOICER_DATASETS", raising=False)
    with pytest.raises(pytest.skip.Exception, match="install the Debian package fluid-soundfont-gm"):
        skip_or_fail_without_dataset(missing)
    monkeypatch.setenv("VOICER_DATASETS", "required")  # what .ci/run sets
    with pytest.raises(pytest.fail.Exception, match="install the Debian package fluid-soundfont-gm"):
        skip_or_fail_without_dataset(missing)
    monkeypatch.delenv("VOICER_DATASETS")
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match=str(missing)):
        skip_or_fail_without_dataset(missing)


# --- the open dataset: FluidR3_GM.sf2, bank 0 program 0 ----------------------------------------

@pytest.fixture(scope="module")
def piano() -> list[Sample]:
    return fluid_piano_samples()


def test_fluid_piano_covers_the_compass(piano):
    roots = [s.root_key for s in piano]
    # The 88-key compass is MIDI 21 (A0) .. 108 (C8) (common practice).
    assert all(21 <= k <= 108 for k in roots)
    assert roots == sorted(set(roots)), "one sample per root key"
    assert all(s.key_range[0] <= s.root_key <= s.key_range[1] for s in piano)
    played = set().union(*(range(s.key_range[0], s.key_range[1] + 1) for s in piano))
    assert played >= set(range(21, 109)), f"keys without a sample: {sorted(set(range(21, 109)) - played)}"
    assert roots[0] <= 30 and roots[-1] >= 100  # recorded notes reach into both ends of the compass
    assert all(s.velocity_range == (0, 127) for s in piano)


def test_fluid_piano_samples_are_real_notes(piano):
    for s in piano:
        assert s.name.count("+") == 1, f"{s.name}: each note is a left/right pair"
        assert s.sample_rate in (22_050, 32_000, 44_100, 48_000, 96_000), s.name  # common rates (common practice)
        f0_hz = 440.0 * 2.0 ** ((s.root_key - 69) / 12)  # ET from A4 = 440 Hz (ISO 16)
        assert s.sample_rate / 2 > 3 * f0_hz, f"{s.name}: fewer than 3 partials below Nyquist"
        assert len(s.data) >= 0.3 * s.sample_rate, f"{s.name}: shorter than 0.3 s"
        assert np.all(np.isfinite(s.data)) and np.max(np.abs(s.data)) < 1.0, s.name
        assert np.max(np.abs(s.data)) > 0.1, f"{s.name}: peak below -20 dBFS"
        assert abs(s.pitch_correction_cents) <= 50, s.name
        # A struck note decays: its last tenth is quieter than its loudest tenth (common practice).
        tenths = np.sqrt(np.mean(s.data[: len(s.data) // 10 * 10].reshape(10, -1) ** 2, axis=1))
        assert tenths[-1] < tenths.max() / 2, f"{s.name}: does not decay"
