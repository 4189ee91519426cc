"""voicer compare: the evenness table, JSON, plots and the client's HTML report."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from browser import loaded_images

from voicer.cli import main

MELLOW = str(Path(__file__).resolve().parent.parent / "presets" / "voicings" / "kestrel-190-mellow.toml")


def run(capsys, *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_json_before_and_after_a_plan(capsys) -> None:
    """The README's schema: per key and dynamic the metrics before and after, the trend and
    the deviation, flagged_keys, and the summary's rms deviations. The mellow plan softens
    the felt of keys 52-81 by 15 % (common practice: a softer hammer is darker and quieter),
    so brightness and loudness fall there and not below."""
    code, out, _ = run(capsys, "compare", "demo", "--keys", "40-70", "--voicing", MELLOW, "--json")
    assert code == 0
    data = json.loads(out)
    assert data["dynamics"] == ["pp", "mf", "ff"] and data["voicing"] == "mellower middle"
    rows = {(r["key"], r["dynamic"]): r for r in data["keys"]}
    assert len(rows) == 31 * 3
    for field in ("before", "after", "trend_before", "trend_after", "deviation_before", "deviation_after"):
        assert set(rows[(60, "mf")][field]) == set(data["metrics"])
    for dyn in ("pp", "mf", "ff"):
        r = rows[(60, dyn)]
        assert r["after"]["brightness"] < r["before"]["brightness"]
        assert r["after"]["loudness_phon"] < r["before"]["loudness_phon"]
        assert rows[(45, dyn)]["after"] == rows[(45, dyn)]["before"]
        assert r["deviation_before"]["brightness"] == pytest.approx(
            r["before"]["brightness"] - r["trend_before"]["brightness"], abs=2e-4)
    assert data["flagged_keys"] == [] and data["flagged_keys_after"] == []
    summary = data["summary"]
    for name in ("brightness_rms_dev_before", "brightness_rms_dev_after", "loudness_rms_dev_before",
                 "loudness_rms_dev_after"):
        assert isinstance(summary[name], float) and summary[name] >= 0


def test_text_plot_and_html_report_a_browser_opens(capsys, tmp_path) -> None:
    pytest.importorskip("matplotlib")
    png, page = tmp_path / "even.png", tmp_path / "report.html"
    code, out, _ = run(capsys, "compare", "demo", "--keys", "52-67", "--voicing", MELLOW, "--plot", str(png),
                       "--html", str(page))
    assert code == 0
    assert "C4 ( 60)" in out and "rms deviation of brightness" in out and "flagged keys" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    text = page.read_text(encoding="utf-8")
    assert "needling cannot be undone" in text
    images = loaded_images(page, tmp_path)
    assert images and all(w > 0 and h > 0 and done for _, w, h, done in images), images


def test_bad_arguments(capsys) -> None:
    assert run(capsys, "compare", "demo", "--keys", "40-42")[0] == 2
    code, _, err = run(capsys, "compare", "demo", "--keys", "20-60")
    assert code == 2 and "21..108" in err
    code, _, err = run(capsys, "compare", "demo", "--voicing", "nowhere.toml")
    assert code == 2 and "nowhere.toml" in err
    code, _, err = run(capsys, "compare", "demo", "--keys", "abc")
    assert code == 2 and "--keys 'abc'" in err and err.count("\n") == 1
    code, _, err = run(capsys, "compare", "demo", "--keys", "40-50,60-70")
    assert code == 0


def test_suggest_refuses_an_output_it_cannot_write(capsys, tmp_path) -> None:
    for out, words in ((tmp_path / "nowhere" / "plan.toml", "does not exist"), (tmp_path / "plan.txt", ".toml file")):
        code, _, err = run(capsys, "suggest", "demo", "-o", str(out))
        assert code == 2 and words in err and err.count("\n") == 1, err
    assert list(tmp_path.iterdir()) == []
