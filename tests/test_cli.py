"""The command line: scale table and JSON schema, demo, errors with exit status 2."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from needs import check_portaudio

from voicer.cli import main
from voicer.physics.tuning import KEYS

JSON_KEY_FIELDS = {"key", "f0_hz", "length_m", "tension_n", "b", "strings", "strike_ratio", "partials_hz"}


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_scale_json_schema(capsys, demo) -> None:
    code, out, err = run(capsys, "scale", "demo", "--json")
    assert code == 0 and err == ""
    data = json.loads(out)
    assert [k["key"] for k in data["keys"]] == KEYS.tolist()
    for row in data["keys"]:
        assert JSON_KEY_FIELDS <= set(row)
        assert len(row["partials_hz"]) == 16
        assert row["partials_hz"][0] == row["f0_hz"]
        assert row["strings"] in (1, 2, 3) and isinstance(row["strings"], int)
    s = demo.scale
    np.testing.assert_allclose([k["tension_n"] for k in data["keys"]], s.tension_n, rtol=1e-15)
    np.testing.assert_allclose([k["f0_hz"] for k in data["keys"]], s.f1_hz, rtol=1e-12)
    assert data["keys"][69 - 21]["f0_hz"] == pytest.approx(440.0, abs=1e-9)


def test_scale_json_matches_the_readme(capsys) -> None:
    # The README documents the schema: its table lists exactly the fields of each key, and
    # its sentence the top-level ones.
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    section = readme.split("### `voicer scale --json`", 1)[1].split("\n### ", 1)[0]
    documented = set(re.findall(r"^\| `(\w+)` \|", section, flags=re.M))
    top, table = section.split("| field |", 1)
    code, out, _ = run(capsys, "scale", "demo", "--json")
    data = json.loads(out)
    assert code == 0 and documented == set(data["keys"][0]) and JSON_KEY_FIELDS <= documented
    assert set(re.findall(r"`(\w+)`", top)) >= set(data)


def test_scale_json_partials_option(capsys) -> None:
    code, out, _ = run(capsys, "scale", "demo", "--json", "--partials", "4")
    assert code == 0 and all(len(k["partials_hz"]) == 4 for k in json.loads(out)["keys"])


def test_scale_table_lists_the_compass(capsys, demo_path) -> None:
    code, out, _ = run(capsys, "scale", str(demo_path))
    assert code == 0
    rows = [line for line in out.splitlines() if line[:4].strip().isdigit()]
    assert [int(r.split()[0]) for r in rows] == KEYS.tolist()
    assert " 69 A4      440.00" in out


def test_demo_renders_both_states_and_plays_them(tmp_path) -> None:
    """`voicer demo` as a command, with an audio device: ALSA's null plugin as the default
    PCM (a test-local HOME with an .asoundrc holding pcm.!default { type null }, as in
    tests/test_cli_audio.py; Debian's libportaudio2). It writes both WAVs and plays both
    through PortAudio (the null device is unclocked: faster than real time)."""
    import soundfile as sf

    import voicer

    home = tmp_path / "home"
    home.mkdir()
    (home / ".asoundrc").write_text("pcm.!default { type null }\n")
    out_dir = tmp_path / "demo"
    env = dict(os.environ, HOME=str(home), XDG_CONFIG_HOME=str(home / ".config"),
               PYTHONPATH=os.pathsep.join([str(Path(voicer.__file__).parents[1]), os.environ.get("PYTHONPATH", "")]))
    env.pop("ALSA_CONFIG_PATH", None)  # ALSA's own system configuration, then the test's .asoundrc
    # The table cache is this test's (conftest's VOICER_CACHE_DIR, inherited); warnings are errors there too.
    done = subprocess.run([sys.executable, "-W", "error", "-m", "voicer", "demo", "--out-dir", str(out_dir)], env=env,
                          stdin=subprocess.DEVNULL, capture_output=True, text=True, timeout=600)
    out = done.stdout
    check_portaudio(out)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr, done.stderr
    assert "KH-190 salon grand" in out and "not playing" not in out, out
    for state in "AB":
        path = out_dir / f"demo-{state}.wav"
        assert f"wrote {path}" in out
        data, rate = sf.read(path)
        assert rate == 48_000 and 30 < len(data) / rate < 40 and 0.1 < abs(data).max() < 10 ** (-1 / 20)
        # Played through the device to the end of the file, with no late or silenced block.
        assert f"playing demo-{state}.wav ({len(data) / rate:.0f} s; Ctrl-C to skip)" in out.splitlines(), out
        assert f"played demo-{state}.wav after {len(data) / rate:.1f} s on default" in out.splitlines(), out
    a, b = sf.read(out_dir / "demo-A.wav")[0], sf.read(out_dir / "demo-B.wav")[0]
    assert a.shape == b.shape and not np.allclose(a, b)  # the voicing is heard
    # The scenario (presets/voicings/kestrel-190-wear.toml): the worn hammers are the
    # outliers the table shows and the plan treats, and the client's report is written.
    for key in ("D3 ( 50)", "D#3 ( 51)", "E4 ( 64)", "G4 ( 67)"):
        assert key in out
    plan = (out_dir / "suggested-plan.toml").read_text()
    assert "D3 (50): harden" in plan and "E4 (64): needle" in plan and "G4 (67): needle" in plan
    assert "needling cannot be undone" in (out_dir / "report.html").read_text()


def test_bad_preset_exits_2_with_one_line(capsys, tmp_path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text("[[anchor]]\nkey = 60\nstrings = 4\n")
    code, out, err = run(capsys, "scale", str(bad))
    assert code == 2 and out == ""
    assert err.count("\n") == 1
    assert err.startswith(f"voicer scale: error: {bad}: key 60: field 'strings'") and "1..3" in err


def test_missing_preset_names_the_bundled_ones(capsys) -> None:
    code, _, err = run(capsys, "scale", "no-such-piano")
    assert code == 2 and "no such preset file" in err and "kestrel-190" in err


@pytest.mark.parametrize("argv", [["scale"], ["scale", "demo", "--partials", "0"], ["frobnicate"]])
def test_usage_errors_exit_2(argv, capsys) -> None:
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2


@pytest.mark.parametrize("command", ["demo", "scale", "inspect", "render", "play", "devices", "plugins", "analyze",
                                     "fit", "record", "compare", "suggest"])
def test_help_has_an_example(command, capsys) -> None:
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    assert "example" in capsys.readouterr().out


def test_module_entry_point() -> None:
    done = subprocess.run([sys.executable, "-m", "voicer", "scale", "demo", "--json"],
                          capture_output=True, text=True, check=True)
    assert len(json.loads(done.stdout)["keys"]) == 88


# --- voicer inspect ------------------------------------------------------------------

INSPECT_FIELDS = {"key", "velocity", "hammer_speed_m_s", "contact_ms", "peak_force_n", "partials"}


def test_inspect_json_schema(capsys, demo) -> None:
    code, out, err = run(capsys, "inspect", "demo", "--key", "60", "--velocity", "64", "--json")
    assert code == 0 and err == ""
    data = json.loads(out)
    assert INSPECT_FIELDS <= set(data)
    assert data["key"] == 60 and data["velocity"] == 64
    assert 1.5 < data["contact_ms"] < 4.0 and data["peak_force_n"] > 0
    first = data["partials"][0]
    assert {"n", "freq_hz", "level_db", "t60_s"} <= set(first)
    assert first["n"] == 1 and first["freq_hz"] == pytest.approx(demo.scale.f1_hz[60 - 21], rel=1e-5)
    assert len(data["partials"]) == 24


def test_inspect_text(capsys) -> None:
    code, out, _ = run(capsys, "inspect", "demo", "--key", "40", "--velocity", "90", "--partials", "8")
    assert code == 0
    assert out.startswith("key 40 (E2), velocity 90: hammer at 2.89 m/s on 2 string(s)")
    assert "contact" in out and "peak force" in out
    assert len([line for line in out.splitlines() if line[:4].strip().isdigit()]) == 8


def test_inspect_set_changes_the_prediction(capsys) -> None:
    _, soft, _ = run(capsys, "inspect", "demo", "--key", "60", "--json", "--set", "felt_force_1mm_n=70")
    _, hard, _ = run(capsys, "inspect", "demo", "--key", "60", "--json", "--set", "felt_force_1mm_n=280")
    assert json.loads(hard)["contact_ms"] < json.loads(soft)["contact_ms"]
    # --set repeats: both changes take effect (a heavier hammer lengthens the harder blow).
    _, both, _ = run(capsys, "inspect", "demo", "--key", "60", "--json", "--set", "felt_force_1mm_n=280",
                     "--set", "hammer_mass_g=15")
    assert json.loads(hard)["contact_ms"] < json.loads(both)["contact_ms"]


@pytest.mark.parametrize("setting, message", [
    ("strike_ratio=0.6", "key 60: field 'strike_ratio': 0.6 is outside the allowed range 0 < x < 0.5"),
    ("hardness=2", "--set hardness: not a per-key field"),
    ("strike_ratio", "expected FIELD=VALUE"),
    ("felt_exponent=soft", "field 'felt_exponent': expected a number"),
])
def test_inspect_set_is_validated(capsys, setting, message) -> None:
    code, out, err = run(capsys, "inspect", "demo", "--key", "60", "--set", setting)
    assert code == 2 and out == "" and message in err and err.count("\n") == 1


def test_inspect_plot(capsys, tmp_path, monkeypatch) -> None:
    figure = pytest.importorskip("matplotlib.figure")
    saved = []
    original = figure.Figure.savefig

    def keep(fig, *args, **kwargs):  # the figure as written, to look at its panels
        saved.append(fig)
        return original(fig, *args, **kwargs)

    monkeypatch.setattr(figure.Figure, "savefig", keep)
    png = tmp_path / "c4.png"
    code, out, _ = run(capsys, "inspect", "demo", "--key", "60", "--plot", str(png))
    assert code == 0 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and f"plot written to {png}" in out
    _, report, _ = run(capsys, "inspect", "demo", "--key", "60", "--json")
    report = json.loads(report)
    pulse, bridge, spectrum = saved[0].axes
    # The force pulse peaks at the reported peak force; the bridge force spans 50 ms; the
    # spectrum marks the harmonic positions n f1 beside the partials.
    assert max(pulse.lines[0].get_ydata()) == pytest.approx(report["peak_force_n"], rel=1e-6)
    assert max(bridge.lines[0].get_xdata()) == pytest.approx(50.0, abs=0.1)
    f1 = report["partials"][0]["freq_hz"]
    marks = sorted(line.get_xdata()[0] for line in spectrum.lines if line.get_linestyle() == ":" and
                   len(line.get_xdata()))
    assert marks[:3] == pytest.approx([f1, 2 * f1, 3 * f1], rel=1e-6)


@pytest.mark.parametrize("argv", [["inspect", "demo"], ["inspect", "demo", "--key", "20"],
                                  ["inspect", "demo", "--key", "60", "--velocity", "128"]])
def test_inspect_usage_errors(argv) -> None:
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2


def test_plot_without_matplotlib_says_what_to_install(capsys, tmp_path, monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import fails as if not installed
    code, _, err = run(capsys, "inspect", "demo", "--key", "60", "--plot", str(tmp_path / "x.png"))
    assert code == 2 and "plots need matplotlib: pip install 'voicer[plots]'" in err
