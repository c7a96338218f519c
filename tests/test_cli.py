"""The command line: rooms, ir, analyze, and one-line errors with documented exit codes."""

import contextlib
import json

import numpy as np
import pytest
import soundfile as sf

from render.catalogue import CATALOGUE
from render.cli import EXIT_INPUT, EXIT_OK, EXIT_PARAMETER, EXIT_USAGE, main


def test_rooms_lists_every_built_in_room(capsys):
    assert main(["rooms"]) == EXIT_OK
    out = capsys.readouterr().out
    for name in CATALOGUE:
        assert name in out
    assert main(["rooms", "--json"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert {r["name"] for r in rows} == set(CATALOGUE)
    for r in rows:  # derived values shown to users: 4V/S and 0.161 V/T (REFERENCES.md formulas)
        room = CATALOGUE[r["name"]]
        assert r["mean_free_path_m"] == pytest.approx(4 * room.volume_m3 / room.surface_m2, abs=0.01)
        assert r["sabine_absorption_m2"] == pytest.approx(0.161 * room.volume_m3 / room.decay_mid_s, abs=0.1)


def test_ir_then_analyze_reads_the_targets(tmp_path, capsys):
    out = tmp_path / "booth.wav"
    assert main(["ir", "speech-booth", "--rate", "48000", "--channels", "2", "-o", str(out), "--quiet"]) == EXIT_OK
    info = sf.info(str(out))
    assert (info.samplerate, info.channels, info.subtype) == (48000, 2, "FLOAT")
    capsys.readouterr()
    assert main(["analyze", str(out), "--json"]) == EXIT_OK
    result = json.loads(capsys.readouterr().out)
    targets = CATALOGUE["speech-booth"].band_targets_s
    for ch in result["channels"]:
        for band, target in zip(ch["bands"], targets):
            # ISO 3382-1 T30 within 3 % of the room's targets (float32 file, as any convolver loads it)
            assert band["t30_s"] == pytest.approx(target, rel=0.03), band["band_hz"]
    assert main(["analyze", str(out)]) == EXIT_OK
    assert "T30 (s)" in capsys.readouterr().out


@pytest.mark.parametrize(
    "argv, code, text",
    [
        (["ir", "ballroom", "-o", "x.wav"], EXIT_PARAMETER, "room 'ballroom' is not built in"),
        (["analyze", "missing.wav"], EXIT_INPUT, "missing.wav"),
        (["ir", "speech-booth"], EXIT_USAGE, "-o/--output"),
        (["frobnicate"], EXIT_USAGE, "invalid choice"),
    ],
)
def test_errors_are_one_line_with_an_exit_code(tmp_path, monkeypatch, capsys, argv, code, text):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(SystemExit) if code == EXIT_USAGE else contextlib.nullcontext() as exc:
        rc = main(argv)
    if code == EXIT_USAGE:
        rc = exc.value.code
    assert rc == code
    err = capsys.readouterr().err
    assert text in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_analyze_refuses_silence(tmp_path, capsys):
    path = tmp_path / "zeros.wav"
    sf.write(str(path), np.zeros((4800, 1)), 48000, subtype="FLOAT")
    assert main(["analyze", str(path)]) == EXIT_PARAMETER
    assert "render:" in capsys.readouterr().err


@pytest.mark.parametrize("argv, code", [(["rooms"], EXIT_OK), (["ir", "no-such-room", "-o", "x.wav"], EXIT_PARAMETER)])
def test_the_command_entry_returns_mains_exit_code_then_freezes_the_collector(argv, code, monkeypatch, tmp_path):
    import gc
    import subprocess
    import sys

    from render import cli

    calls = []
    monkeypatch.setattr(gc, "freeze", lambda: calls.append("freeze"))
    monkeypatch.chdir(tmp_path)
    assert cli.entry(argv) == code == main(argv)
    assert calls == ["freeze"]  # once, after the command
    # And as installed: `python -m render` exits with the same code.
    proc = subprocess.run([sys.executable, "-m", "render", *argv], capture_output=True, text=True)
    assert proc.returncode == code, proc.stderr
