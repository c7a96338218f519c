"""Job files: one validation pass; every error names file, key path, value and what was expected."""

import textwrap

import pytest

from render.errors import JobError
from render.job import SCHEMA, load_job, parse_job

MINIMAL = """
[[sources]]
files = ["media/*.wav"]
room = "living-room"
"""


def parse(text, path="jobs/t.toml"):
    return parse_job(textwrap.dedent(text), path=path)


def test_minimal_job_takes_documented_defaults():
    job = parse(MINIMAL)
    assert job.name == "t"
    assert job.stems == ("mix", "wet", "dry")
    assert (job.format, job.subtype, job.tail, job.tail_floor_db) == ("wav", "same", "extend", -90.0)
    assert job.name_pattern == "{dir}/{name}.{stem}"
    assert str(job.output_dir).endswith("jobs/out/t")
    g = job.groups[0]
    assert (g.room, g.wet_db, g.dry_db, g.channels) == ("living-room", -12.0, 0.0, None)


def test_rooms_mix_and_group_overrides():
    job = parse("""
        [job]
        name = "reel"
        output = "out/reel"
        stems = ["mix", "wet"]
        [rooms.kitchen]
        base = "living-room"
        decay_s = 0.55
        predelay_ms = 6
        [rooms.shed]
        decay_bands_s = [0.9, 0.8, 0.7, 0.6, 0.5, 0.4, 0.3]
        size_m = [3, 2.5, 2.2]
        [mix]
        wet_db = -14
        [[sources]]
        files = ["a/*.wav"]
        room = "kitchen"
        wet_db = -10
        [[sources]]
        files = ["b/*.wav"]
        room = "shed"
        distance_m = 1.5
        channels = 2
    """)
    assert job.rooms["kitchen"].decay_mid_s == pytest.approx(0.55)
    assert job.rooms["kitchen"].predelay_ms == 6.0
    assert job.rooms["shed"].band_targets_s[0] == 0.9
    assert job.groups[0].wet_db == -10.0
    g1 = job.groups[1]
    assert g1.wet_db is None and g1.distance_m == 1.5 and g1.channels == 2
    assert job.room_for(g1).distance_m == pytest.approx(1.5)


@pytest.mark.parametrize(
    "text, match",
    [
        ("[rooms.kitchen]\nbase = 'living-room'\ndecay_s = -1.0\n" + MINIMAL,
         r"jobs/t\.toml: rooms\.kitchen\.decay_s = -1\.0: must be a reverberation time"),
        ("[job]\nstem = ['mix']\n" + MINIMAL, r"jobs/t\.toml: job\.stem: unknown key"),
        ("[job]\nstems = ['mix', 'reverb']\n" + MINIMAL, r"job\.stems = \[\"mix\", \"reverb\"\]"),
        ("[job]\nformat = 'mp3'\n" + MINIMAL, r'job\.format = "mp3": must be one of "wav", "flac"'),
        ("[job]\nformat = 'flac'\nsubtype = 'FLOAT'\n" + MINIMAL, r"job\.subtype = \"FLOAT\": FLAC holds no"),
        ("[job]\ntail = 'long'\n" + MINIMAL, r'job\.tail = "long"'),
        ("[job]\ntail_floor_db = -10\n" + MINIMAL, r"job\.tail_floor_db = -10: must be from -150 to -20 dB"),
        ("[job]\nname_pattern = '{name}'\n" + MINIMAL, r"must contain \{stem\}"),
        ("[job]\nname_pattern = '{stem}'\n" + MINIMAL, r"must contain \{name\}"),
        ("[job]\nname_pattern = '{name}.{stem}.{take}'\n" + MINIMAL, r"unknown field \{take\}"),
        ("[job]\nname_pattern = '/abs/{name}.{stem}'\n" + MINIMAL, r"must be relative"),
        ("[rooms.k]\nbase = 'nowhere'\n" + MINIMAL, r"rooms\.k\.base = \"nowhere\": must be a built-in room"),
        ("[rooms.k]\nbase = 'living-room'\nlength = 3\n" + MINIMAL, r"rooms\.k\.length: unknown key"),
        ("[rooms.k]\nsize_m = [3, 3, 3]\n" + MINIMAL, r"rooms\.k\.decay_s = None: a room needs"),
        ("[rooms.k]\ndecay_s = 1\nsize_m = [3, 3]\n" + MINIMAL, r"rooms\.k\.size_m = \[3, 3\]"),
        ("[mix]\nwet_db = 'loud'\n" + MINIMAL, r'mix\.wet_db = "loud": must be a number \(dB\)'),
        ("[mix]\nwet_db = -10\ndistance_m = 3\n" + MINIMAL, r"mix: give wet_db or distance_m, not both"),
        ("[mix]\nchannels = 3\n" + MINIMAL, r'mix\.channels = 3: must be "same" or 2'),
        ("[mix]\nreverb = 1\n" + MINIMAL, r"mix\.reverb: unknown key"),
        ("[job]\nname = 'x'\n", r"sources: a job needs at least one \[\[sources\]\] table"),
        ("[[sources]]\nroom = 'living-room'\n", r"sources\[0\]\.files: required"),
        ("[[sources]]\nfiles = []\nroom = 'living-room'\n", r"sources\[0\]\.files = \[\]"),
        ("[[sources]]\nfiles = ['a.wav']\n", r"sources\[0\]\.room: required"),
        ("[[sources]]\nfiles = ['a.wav']\nroom = 'attic'\n", r'sources\[0\]\.room = "attic": must be a room'),
        ("[[sources]]\nfiles = ['a.wav']\nroom = 'living-room'\nwet = 1\n", r"sources\[0\]\.wet: unknown key"),
        ("[[sources]]\nfiles = ['a.wav']\nroom = 'speech-booth'\ndistance_m = 40\n",
         r"sources\[0\]\.distance_m = 40\.0: must fit inside the room"),
        ("[output]\nx = 1\n" + MINIMAL, r"jobs/t\.toml: output: unknown key"),
        ("this is = = not toml", r"jobs/t\.toml: not valid TOML"),
    ],
)
def test_every_error_names_file_key_value_and_expectation(text, match):
    with pytest.raises(JobError, match=match):
        parse(text)


def test_load_job_reports_unreadable_file(tmp_path):
    with pytest.raises(JobError, match=r"missing\.toml: cannot read the job file"):
        load_job(tmp_path / "missing.toml")


def test_job_hash_changes_with_text():
    assert parse(MINIMAL).text_sha256 != parse(MINIMAL + "\n# changed\n").text_sha256


def test_schema_lists_every_section():
    assert set(SCHEMA) == {"job", "rooms.NAME", "mix", "loudness", "sources"}
