"""Fitting a room to a recording made in it: render.fit.

Impulse responses are checked against the rooms they were synthesised for,
with ISO 3382-1 T30 as the reference definition of the reverberation time.
Running speech is checked in a closed loop: invented speech-like material
(seeded noise in syllables, words and sentence pauses; no recording of a
person) is convolved with a room's response, mixed with the dry signal at a
known wet/dry balance, and noise is added at a known SNR; the blind estimate
is compared with the room's targets.
"""

import json
import math

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover
    import tomli as tomllib

import numpy as np
import pytest
import scipy.signal

from render import fit
from render.acoustics import OCTAVE_BANDS_HZ
from render.catalogue import get_room
from render.errors import AnalysisError, ParameterError
from render.room import Room
from render.synthesis import synthesize

RATE = 48000
CENTRAL = (500.0, 1000.0, 2000.0, 4000.0)
LN10 = math.log(10.0)


# ------------------------------------------------------------------ test material


def speech_like(rng, duration_s, rate_hz):
    """Invented speech-like signal, shape (frames, 1).

    Sentences of 2-7 words, words of 1-3 syllables (80-250 ms, 8-20 ms
    raised-cosine attack, 20-50 ms release, levels spread over 10 dB), word
    gaps of 20-150 ms and sentence pauses of 0.4-1.6 s of digital silence.
    The carrier per syllable mixes a voiced-like noise (100 Hz high-pass,
    -6 dB/octave above 600 Hz) and a fricative-like noise (above 2 kHz, 10 dB
    down).  RMS 0.1 over the whole signal.
    """
    frames = int(round(duration_s * rate_hz))
    voiced, fricative = np.zeros(frames), np.zeros(frames)
    t = 0.2
    while t + 1.0 < duration_s:
        for _ in range(int(rng.integers(2, 8))):
            for _ in range(int(rng.integers(1, 4))):
                length = int(rng.uniform(0.08, 0.25) * rate_hz)
                attack = int(rng.uniform(0.008, 0.02) * rate_hz)
                release = int(rng.uniform(0.02, 0.05) * rate_hz)
                start = int(t * rate_hz)
                if start + length + release >= frames:
                    break
                env = np.ones(length + release)
                env[:attack] = 0.5 - 0.5 * np.cos(np.pi * np.arange(attack) / attack)
                env[length:] = 0.5 + 0.5 * np.cos(np.pi * np.arange(release) / release)
                gain = 10.0 ** (rng.uniform(-10.0, 0.0) / 20.0)
                share = rng.uniform(0.0, 0.8)
                voiced[start : start + env.size] += gain * np.sqrt(1.0 - share) * env
                fricative[start : start + env.size] += gain * np.sqrt(share) * env
                t += length / rate_hz + rng.uniform(0.0, 0.03)
            t += rng.uniform(0.02, 0.15)
        t += rng.uniform(0.4, 1.6)
    low_sos = np.vstack(
        [
            scipy.signal.butter(2, 100.0, "highpass", fs=rate_hz, output="sos"),
            scipy.signal.butter(1, 600.0, "lowpass", fs=rate_hz, output="sos"),
        ]
    )
    low = scipy.signal.sosfilt(low_sos, rng.standard_normal(frames))
    high_sos = scipy.signal.butter(2, 2000.0, "highpass", fs=rate_hz, output="sos")
    high = scipy.signal.sosfilt(high_sos, rng.standard_normal(frames))
    x = voiced * low / np.std(low) + 0.3 * fricative * high / np.std(high)
    return (0.1 * x / np.sqrt(np.mean(x * x)))[:, np.newaxis]


def recording(dry, ir, *, wet_db, snr_db, rng):
    """dry + wet at ``wet_db`` (the response has unit energy) + white noise ``snr_db`` below the mix's RMS.

    Each channel of ``ir`` convolves the (mono) dry signal; scipy's fftconvolve is the reference convolution.
    """
    wet = np.stack(
        [scipy.signal.fftconvolve(dry[:, 0], ir[:, c])[: dry.shape[0]] for c in range(ir.shape[1])], axis=1
    )
    mix = dry + 10.0 ** (wet_db / 20.0) * wet
    if snr_db is not None:
        mix = mix + rng.standard_normal(mix.shape) * np.sqrt(np.mean(mix * mix)) * 10.0 ** (-snr_db / 20.0)
    return mix


def random_room(seed, low_s, high_s):
    """A seeded room: T at 1 kHz log-uniform in [low_s, high_s], 125 Hz 1.0-1.4 times it, 4 kHz 0.7-1.0 times.

    The size follows the decay (V = 600 T³ m³, proportions 1.6 : 1.25 : 1),
    the talker 1-3 m from the microphone.  The smooth tilt is like the
    catalogue's rooms (see the report on steep band-to-band steps).
    """
    rr = np.random.default_rng(seed)
    t_mid = float(np.exp(rr.uniform(np.log(low_s), np.log(high_s))))
    side = (600.0 * t_mid**3 / 2.0) ** (1.0 / 3.0)
    return Room(
        name=f"random-{seed}",
        decay_s=t_mid,
        decay_lf_s=t_mid * float(rr.uniform(1.0, 1.4)),
        decay_hf_s=t_mid * float(rr.uniform(0.7, 1.0)),
        size_m=(1.6 * side, 1.25 * side, max(2.4, side)),
        distance_m=float(rr.uniform(1.0, 3.0)),
        seed=seed,
    )


SPEECH_ROOMS = {
    "living-room": lambda: get_room("living-room"),
    "raked-auditorium": lambda: get_room("raked-auditorium"),
    "parish-hall": lambda: get_room("parish-hall"),
    "random-short": lambda: random_room(1, 0.3, 0.6),
    "random-middle": lambda: random_room(2, 0.6, 1.3),
    "random-long": lambda: random_room(3, 1.3, 3.0),
}


@pytest.fixture(scope="module")
def dry():
    return speech_like(np.random.default_rng(2026), 40.0, RATE)


def errors_pct(result, room, bands=CENTRAL):
    """{band: 100 (estimate / target - 1)} (None where not measured)."""
    out = {}
    for band in bands:
        b = result.band(band)
        target = float(room.decay_at(np.array([band]))[0])
        out[band] = None if b is None or b.decay_s is None else 100.0 * (b.decay_s / target - 1.0)
    return out


def make_result(decays, *, verdicts=None, kind="speech", drr_db=None, predelay_ms=None):
    """A hand-made FitResult with the given decay per octave band (None: not measurable)."""
    bands = []
    for k, (f, d) in enumerate(zip(OCTAVE_BANDS_HZ, decays)):
        verdict = (verdicts or {}).get(f, "ok" if d is not None else "not measurable")
        reason = None if verdict == "ok" else "made up"
        bands.append(fit.FitBand(f, d, 0 if d is None else 9, None if d is None else 4.0, verdict, reason))
    return fit.FitResult(kind, float(RATE), 30.0, 50.0, tuple(bands), predelay_ms, drr_db, ())


# ------------------------------------------------------------------ impulse responses


@pytest.mark.parametrize("name", ["living-room", "school-classroom", "raked-auditorium", "parish-hall"])
def test_synthesised_response_reproduces_the_room(name):
    room = get_room(name)
    result = fit.fit_recording(synthesize(room, rate_hz=RATE, channels=1).ir, rate_hz=RATE)
    assert result.kind == "impulse"
    assert len(result.bands) == 7
    for band, target in zip(result.bands, room.band_targets_s):
        # ISO 3382-1:2009 T30 is the reference; 3 % is the engine's promise for its responses (README).
        # "uncertain" is allowed: ISO 3382-2's curvature flag (T30/T20 > 1.1) marks some synthetic bands.
        assert band.verdict in ("ok", "uncertain")
        assert band.decay_s == pytest.approx(target, rel=0.03)


def first_order_gap_ms(room):
    """Delay of the first wall reflection after the direct sound, from the six mirror images of a shoebox."""
    src, lis, size = np.array(room.source_m), np.array(room.listener_m), np.array(room.size_m)
    direct = np.linalg.norm(src - lis)
    images = []
    for axis in range(3):
        for wall in (0.0, size[axis]):
            image = src.copy()
            image[axis] = 2.0 * wall - src[axis]
            images.append(np.linalg.norm(image - lis))
    return 1e3 * (min(images) - direct) / room.speed_of_sound


@pytest.mark.parametrize("name", ["living-room", "raked-auditorium", "parish-hall"])
@pytest.mark.parametrize("wet_db", [6.0, 12.0])
def test_measured_like_response_gives_decay_balance_and_gap(name, wet_db, rng):
    # What a measurement looks like: silence, the direct sound, the room, a noise floor 100 dB down;
    # the microphone beyond the critical distance (wet_db > 0), as usual when measuring a room.
    room = get_room(name)
    wet = synthesize(room, rate_hz=RATE, channels=1).ir
    lead = 480
    x = np.zeros((lead + wet.shape[0], 1))
    x[lead, 0] = 1.0
    x[lead:] += 10.0 ** (wet_db / 20.0) * wet
    x += 1e-5 * rng.standard_normal(x.shape)
    result = fit.fit_recording(x, rate_hz=RATE)
    assert result.kind == "impulse"
    for band in CENTRAL:
        # ISO 3382-1 T30 as the reference; the direct sound must not bias it beyond 3 %
        assert result.band(band).decay_s == pytest.approx(float(room.decay_at(np.array([band]))[0]), rel=0.03)
    # The response has unit energy, so the reverberant energy is 10^(wet_db/10) times the direct sound's.
    assert result.drr_db == pytest.approx(-wet_db, abs=0.05)
    # Allen & Berkley image sources (first order, computed here): the first reflection's delay, ±0.1 ms.
    assert result.predelay_ms == pytest.approx(first_order_gap_ms(room), abs=0.1)


def test_t20_stands_in_when_t30_is_not_measurable():
    # An exponential noise decay (T = 0.5 s) over a noise floor 40 dB down: enough range for T20
    # (35 dB) but not for T30 (45 dB), ISO 3382-1.
    rng = np.random.default_rng(4)
    t = np.arange(RATE) / RATE
    x = rng.standard_normal(RATE) * np.exp(-3.0 * LN10 * t / 0.5) + 0.01 * rng.standard_normal(RATE)
    result = fit.fit_recording(np.concatenate([np.zeros(480), x])[:, np.newaxis], rate_hz=RATE)
    assert result.kind == "impulse"
    for band in result.bands:
        assert band.verdict == "uncertain"
        assert "T20 used" in band.reason
        # one noise realisation with a floor: within 20 % (±15 % seen), the point is the fallback
        assert band.decay_s == pytest.approx(0.5, rel=0.2)


# ------------------------------------------------------------------ what is an impulse


def clap(rng):
    """A 2 ms noise burst, then a 0.4 s exponential noise tail, in a floor 70 dB down."""
    frames = RATE
    x = 10.0 ** (-70.0 / 20.0) * rng.standard_normal(frames)
    start = 4800
    x[start : start + 96] += rng.standard_normal(96)
    t = np.arange(frames - start - 96) / RATE
    x[start + 96 :] += 0.3 * rng.standard_normal(t.size) * np.exp(-3.0 * LN10 * t / 0.4)
    return x[:, np.newaxis]


def tone_mix(seconds):
    """Six sines, each slowly amplitude-modulated, never silent: music without gaps."""
    t = np.arange(int(seconds * RATE)) / RATE
    freqs = (220.0, 330.0, 440.0, 660.0, 1320.0, 2640.0)
    x = sum(
        np.sin(2 * np.pi * f * t + k) * (1.0 + 0.3 * np.sin(2 * np.pi * 0.5 * (k + 1) * t))
        for k, f in enumerate(freqs)
    )
    return 0.05 * x[:, np.newaxis]


@pytest.mark.parametrize(
    "make, expected",
    [
        (lambda rng, dry: synthesize(get_room("parish-hall"), rate_hz=RATE, channels=2).ir, True),
        (lambda rng, dry: clap(rng), True),
        (lambda rng, dry: recording(dry[: 10 * RATE], synthesize(get_room("raked-auditorium"), rate_hz=RATE,
                                                                  channels=1).ir, wet_db=0.0, snr_db=60.0, rng=rng),
         False),
        (lambda rng, dry: 0.1 * rng.standard_normal((5 * RATE, 1)), False),
        (lambda rng, dry: tone_mix(5.0), False),
    ],
    ids=["response", "clap", "speech", "noise", "tones"],
)
def test_looks_impulsive(make, expected, rng, dry):
    assert fit.looks_impulsive(make(rng, dry), rate_hz=RATE) is expected


# ------------------------------------------------------------------ running speech


@pytest.mark.parametrize("room_id", list(SPEECH_ROOMS))
@pytest.mark.parametrize("wet_db, snr_db", [(0.0, 60.0), (-6.0, 40.0)])
def test_speech_closed_loop_within_ten_percent(room_id, wet_db, snr_db, dry):
    room = SPEECH_ROOMS[room_id]()
    ir = synthesize(room, rate_hz=RATE, channels=1).ir
    result = fit.fit_recording(recording(dry, ir, wet_db=wet_db, snr_db=snr_db, rng=np.random.default_rng(1)),
                               rate_hz=RATE)
    assert result.kind == "speech"
    for band, err in errors_pct(result, room).items():
        # the room's target is its ISO 3382-1 T30 (render.synthesis calibrates to it); 10 % asked for
        assert err is not None, f"{band:g} Hz: {result.band(band).reason}"
        assert abs(err) <= 10.0, f"{band:g} Hz: {err:+.1f} %"


@pytest.mark.parametrize("room_id", ["living-room", "raked-auditorium", "random-long"])
def test_low_snr_is_flagged_not_confidently_wrong(room_id, dry):
    room = SPEECH_ROOMS[room_id]()
    ir = synthesize(room, rate_hz=RATE, channels=1).ir
    result = fit.fit_recording(recording(dry, ir, wet_db=0.0, snr_db=15.0, rng=np.random.default_rng(1)),
                               rate_hz=RATE)
    errors = errors_pct(result, room, bands=OCTAVE_BANDS_HZ)
    for band in result.bands:
        # either flagged, or right: never an "ok" band more than 10 % off
        assert band.verdict != "ok" or abs(errors[band.band_hz]) <= 10.0
        if band.band_hz >= 1000.0:
            # white noise puts most of its power where speech has least: these bands must be flagged
            assert band.verdict != "ok"


def test_stereo_recording_and_channels_in_antiphase(dry):
    room = get_room("raked-auditorium")
    ir = synthesize(room, rate_hz=RATE, channels=2).ir
    stereo = recording(dry[: 30 * RATE], ir, wet_db=0.0, snr_db=60.0, rng=np.random.default_rng(3))
    result = fit.fit_recording(stereo, rate_hz=RATE)
    assert any("2 channels" in n for n in result.notes)
    for band, err in errors_pct(result, room).items():
        assert err is not None and abs(err) <= 10.0, f"{band:g} Hz"
    # The channels' powers are summed: a channel in anti-phase does not cancel the other.
    mono = stereo[:, :1]
    a = fit.fit_recording(mono, rate_hz=RATE)
    b = fit.fit_recording(np.hstack([mono, -mono]), rate_hz=RATE)
    assert [x.decay_s for x in a.bands] == pytest.approx([x.decay_s for x in b.bands], rel=1e-9)


def test_speech_drr_follows_the_balance(dry):
    # The DRR of speech is rough and reads low: over 7 seeds of this material it came out 0-2.4 dB low
    # in the parish hall and 1-7 dB low in the living room (0.55 s). Checked: it rises with the true
    # balance, and lies from 7.5 dB below to 3 dB above it (that range, observed, not a standard).
    for name in ("living-room", "parish-hall"):
        ir = synthesize(get_room(name), rate_hz=RATE, channels=1).ir
        readings = []
        for wet_db in (0.0, -6.0, -12.0):
            result = fit.fit_recording(recording(dry, ir, wet_db=wet_db, snr_db=60.0, rng=np.random.default_rng(1)),
                                       rate_hz=RATE)
            if result.drr_db is None:
                assert any("direct-to-reverberant ratio not estimated" in n for n in result.notes)
                continue
            assert -7.5 <= result.drr_db + wet_db <= 3.0, (name, wet_db, result.drr_db)
            assert result.wet_db == -result.drr_db
            readings.append(result.drr_db)
        assert len(readings) >= 2, name
        assert readings == sorted(readings), (name, readings)


# ------------------------------------------------------------------ refusals


@pytest.mark.parametrize(
    "make",
    [lambda rng: 0.1 * rng.standard_normal((20 * RATE, 1)), lambda rng: tone_mix(20.0)],
    ids=["continuous-noise", "tones-without-gaps"],
)
def test_continuous_sound_is_refused_with_a_reason(make, rng):
    result = fit.fit_recording(make(rng), rate_hz=RATE)
    assert result.kind == "speech"
    for band in result.bands:
        assert band.verdict == "not measurable"
        assert band.decay_s is None
        assert band.reason.startswith("no free decays: continuous signal")
    with pytest.raises(AnalysisError, match=r"only 0 of the bands 500 Hz - 4 kHz are measurable"):
        fit.fit_room(result, name="x")
    with pytest.raises(AnalysisError, match=r"no free decays"):
        fit.room_table(result, name="x")


def test_short_recording_is_refused(dry):
    ir = synthesize(get_room("living-room"), rate_hz=RATE, channels=1).ir
    result = fit.fit_recording(recording(dry[: 4 * RATE], ir, wet_db=0.0, snr_db=60.0, rng=np.random.default_rng(1)),
                               rate_hz=RATE)
    assert {b.reason for b in result.bands} == {"too short: 4.0 s (needs ≥ 5 s of running sound)"}


def test_dry_speech_has_no_room_to_measure(dry):
    # No room at all: the only decays are the talker's own releases (20-50 ms), shorter than 0.1 s.
    result = fit.fit_recording(recording(dry, np.zeros((1, 1)), wet_db=-120.0, snr_db=60.0,
                                         rng=np.random.default_rng(1)), rate_hz=RATE)
    for band in result.bands:
        assert band.verdict == "not measurable"
    assert all("too dry" in result.band(f).reason for f in CENTRAL)


@pytest.mark.parametrize(
    "signal, rate_hz, error, match",
    [
        (np.zeros(100), RATE, ParameterError, r"shape \(100,\): expected \(frames, channels\)"),
        (np.full((100, 1), np.nan), RATE, ParameterError, "NaN"),
        (np.ones((100, 1)), 0, ParameterError, r"rate_hz = 0: must be"),
        (np.zeros((100, 1)), RATE, AnalysisError, "all zeros"),
    ],
)
def test_bad_input(signal, rate_hz, error, match):
    with pytest.raises(error, match=match):
        fit.fit_recording(signal, rate_hz=rate_hz)


# ------------------------------------------------------------------ the estimator


@pytest.mark.parametrize("rate_per_block", [0.01, 0.2, 1.5])
def test_ml_rate_of_an_exact_exponential(rate_per_block):
    # E_j = exp(-b j) solves the maximum-likelihood equation sum (j - (J-1)/2) exp(b j) E_j = 0 exactly.
    energies = np.exp(-rate_per_block * np.arange(40.0))
    assert fit._ml_decay_rate(energies) == pytest.approx(rate_per_block, rel=1e-9)


def test_ml_rate_of_damped_gaussian_noise(rng):
    # Ratnam et al.'s model itself: white Gaussian noise times a decaying exponential, 60 dB in 0.8 s;
    # block energies of 240 samples. Relative error well under 2 % for 0.5 s (common practice bound).
    t = np.arange(24000) / RATE
    y = rng.standard_normal(t.size) * np.exp(-3.0 * LN10 * t / 0.8)
    energies = (y * y).reshape(-1, 240).sum(axis=1)
    t60 = 6.0 * LN10 / fit._ml_decay_rate(energies) * 240 / RATE
    assert t60 == pytest.approx(0.8, rel=0.02)


# ------------------------------------------------------------------ room tables


def parse_room(text, name):
    table = tomllib.loads(text)["rooms"][name]
    fields = {k: tuple(v) if isinstance(v, list) else v for k, v in table.items()}
    return Room(name=name, **fields), table


def test_room_table_from_speech_parses_and_validates(dry):
    room = get_room("raked-auditorium")
    ir = synthesize(room, rate_hz=RATE, channels=1).ir
    result = fit.fit_recording(recording(dry, ir, wet_db=0.0, snr_db=60.0, rng=np.random.default_rng(1)),
                               rate_hz=RATE)
    text = fit.room_table(result, name="scene-12")
    parsed, table = parse_room(text, "scene-12")
    for f, value in zip(OCTAVE_BANDS_HZ, table["decay_bands_s"]):
        if result.band(f).verdict != "not measurable":
            assert value == pytest.approx(result.band(f).decay_s, abs=5e-4)
    assert "# guess" in text or "guess:" in text
    assert parsed == fit.fit_room(result, name="scene-12")  # the same room either way
    # Sabine (REFERENCES.md) with the stated mean absorption 0.2: T = 0.161 V / (0.2 S), within the rounding
    assert 0.161 * parsed.volume_m3 / (0.2 * parsed.surface_m2) == pytest.approx(table["decay_bands_s"][3], rel=0.05)


def test_room_table_from_impulse_sets_distance_and_predelay(rng):
    room = get_room("raked-auditorium")
    wet = synthesize(room, rate_hz=RATE, channels=1).ir
    x = np.zeros((480 + wet.shape[0], 1))
    x[480, 0] = 1.0
    x[480:] += wet  # wet_db = 0: the talker at the critical distance
    result = fit.fit_recording(x + 1e-5 * rng.standard_normal(x.shape), rate_hz=RATE)
    text = fit.room_table(result, name="hall", size_m=room.size_m)
    parsed, table = parse_room(text, "hall")
    assert table["size_m"] == list(room.size_m)
    # critical distance 0.057 sqrt(V / T) (REFERENCES.md); at DRR = 0 dB the distance is r_c
    r_c = 0.057 * math.sqrt(parsed.volume_m3 / table["decay_bands_s"][3])
    assert table["distance_m"] == pytest.approx(r_c * 10.0 ** (-result.drr_db / 20.0), abs=0.006)
    assert table["distance_m"] == pytest.approx(r_c, rel=0.01)
    # predelay = measured gap minus the fitted room's own first reflection gap, never negative
    assert table["predelay_ms"] == pytest.approx(max(0.0, result.predelay_ms - first_order_gap_ms(parsed)), abs=0.06)


def test_room_table_fills_bands_from_neighbours():
    # 125 Hz, 1 kHz and 8 kHz not measurable: ends held, the middle on a straight line over log frequency.
    result = make_result([None, 1.2, 1.0, None, 0.8, 0.7, None])
    text = fit.room_table(result, name="filled", size_m=(10.0, 8.0, 4.0))
    _, table = parse_room(text, "filled")
    assert table["decay_bands_s"] == pytest.approx([1.2, 1.2, 1.0, 0.9, 0.8, 0.7, 0.7])
    assert "filled from neighbours: 125 Hz, 1 kHz, 8 kHz" in text
    assert text.count("value filled from neighbours") == 3


@pytest.mark.parametrize("name", ["plain_name-2", "scene 12 (take 3)", "bühne"])
def test_room_table_names(name):
    text = fit.room_table(make_result([0.5] * 7), name=name, size_m=(5.0, 4.0, 3.0))
    parsed, _ = parse_room(text, name)
    assert parsed.decay_bands_s == (0.5,) * 7


def test_room_table_refuses_too_few_central_bands():
    result = make_result([0.5, 0.5, 0.5, None, None, 0.5, 0.5])
    with pytest.raises(AnalysisError, match=r"only 2 of the bands 500 Hz - 4 kHz are measurable \(needs 3\)"):
        fit.room_table(result, name="x")
    with pytest.raises(ParameterError, match=r"name = 'a/b'"):
        fit.room_table(make_result([0.5] * 7), name="a/b")


# ------------------------------------------------------------------ compare and print


def test_compare_identical_fits_are_within_the_jnd():
    a = make_result([0.7, 0.65, 0.6, 0.55, 0.5, 0.45, 0.4])
    rows = fit.compare(a, a)
    assert [r.band_hz for r in rows] == list(OCTAVE_BANDS_HZ)
    assert all(r.within_jnd and r.diff_pct == 0.0 for r in rows)
    assert "0 of 7 bands differ" in fit.format_compare(rows)


@pytest.mark.parametrize("factor, within", [(1.10, False), (0.90, False), (1.04, True), (0.96, True)])
def test_compare_flags_changes_beyond_the_jnd(factor, within):
    # ISO 3382-1:2009 Annex A: the JND of the reverberation time is 5 %
    base = [0.7, 0.65, 0.6, 0.55, 0.5, 0.45, 0.4]
    rows = fit.compare(make_result(base), make_result([t * factor for t in base]))
    for r in rows:
        assert r.diff_pct == pytest.approx(100.0 * (factor - 1.0))
        assert r.within_jnd is within


def test_compare_band_not_measurable():
    a = make_result([0.5] * 7)
    b = make_result([0.5, 0.5, 0.5, None, 0.5, 0.5, 0.5])
    rows = fit.compare(a, b)
    assert rows[3].diff_pct is None and rows[3].within_jnd is False and rows[3].b_s is None
    assert "1 not comparable" in fit.format_compare(rows)


def test_format_fit_and_to_dict():
    result = make_result([0.5, None, 0.5, 0.5, 0.5, 0.5, 0.5], verdicts={500.0: "uncertain"})
    text = fit.format_fit(result)
    for label in ("125 Hz", "250 Hz", "1 kHz", "8 kHz"):
        assert label in text
    assert "not measurable: made up" in text and "uncertain: made up" in text
    assert "direct-to-reverberant ratio: not estimated" in text
    data = json.loads(json.dumps(result.to_dict()))
    assert data["bands"][1] == {"band_hz": 250.0, "decay_s": None, "decays": 0, "spread_pct": None,
                                "verdict": "not measurable", "reason": "made up"}


@pytest.mark.parametrize("chunk_blocks", [1, 3, 10_000])
@pytest.mark.parametrize("frames", [96_000, 100_123])
def test_band_energy_in_chunks_equals_one_pass(chunk_blocks, frames, rng):
    # The time-reversed band filter runs backwards in chunks with its state carried: scipy's sosfilt
    # over the whole reversed signal is the reference.
    x = rng.standard_normal((frames, 2))
    sos = fit.analysis.octave_band_sos(1000.0, rate_hz=RATE)
    y = scipy.signal.sosfilt(sos, x[::-1], axis=0)[::-1]
    power = (y * y).sum(axis=1)
    expected = power[: (frames // 240) * 240].reshape(-1, 240).sum(axis=1)
    got = fit._band_energy(x, 1000.0, RATE, 240, chunk_blocks=chunk_blocks)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=0.0)
