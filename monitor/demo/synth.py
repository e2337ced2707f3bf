"""Procedural, seeded audio of the four demo places (our own invented scenario).

- quiet_room: soft room tone, mains hum with harmonics, the odd soft click;
- voices: babble of several talkers, pulse trains through vowel formant filters with a
  syllabic rhythm;
- traffic: road rumble with vehicles passing by (rising and falling band noise with an
  engine tone and a small Doppler glide);
- machinery: motor harmonics, a gear whine and periodic impacts over broadband noise.

Every function takes a `numpy.random.Generator` and returns float32 mono at 16 kHz, so the
same seed gives bit-identical audio.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

SR = 16000

# (F1, F2, F3) Hz of a few vowels (Peterson and Barney 1952 averages, from memory)
VOWELS = np.array([[730, 1090, 2440], [270, 2290, 3010], [530, 1840, 2480],
                   [570, 840, 2410], [300, 870, 2240], [660, 1720, 2410], [440, 1020, 2240]])


def _db(x: float) -> float:
    return 10.0 ** (x / 20.0)


def _normalise(x: np.ndarray, dbfs: float) -> np.ndarray:
    rms = np.sqrt(np.mean(x.astype(np.float64) ** 2)) + 1e-12
    return (x * (_db(dbfs) / np.sqrt(2.0) / rms)).astype(np.float32)


def pink(n: int, rng: np.random.Generator) -> np.ndarray:
    """Approximate 1/f noise (a three-pole, three-zero filter on white noise).

    Parameters
    ----------
    n : int
        Samples.
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(n,)`` float64.

    References
    ----------
    J. O. Smith III, "Spectral Audio Signal Processing", W3K Publishing, 2011, section
    "Example: Synthesis of 1/f Noise (Pink Noise)" (these coefficients, from memory).
    """
    b = [0.049922035, -0.095993537, 0.050612699, -0.004408786]
    a = [1, -2.494956002, 2.017265875, -0.522189400]
    return signal.lfilter(b, a, rng.standard_normal(n + 2000))[2000:]


def brown(n: int, rng: np.random.Generator) -> np.ndarray:
    """Brownian noise of `n` samples (power falling as 1/f^2), float64.

    Integrated white noise through a leaky high-pass, so that it does not drift off; 4000 more
    samples are made and the first 4000 left out, so the filter has settled.

    Parameters
    ----------
    n : int
        Samples.
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(n,)`` float64.
    """
    x = np.cumsum(rng.standard_normal(n + 4000))
    x = signal.lfilter([1, -1], [1, -0.995], x)[4000:]
    return x


def quiet_room(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """`seconds` of a quiet room: soft room tone, mains hum, now and then a soft click.

    Pink noise low-passed at 1.5 to 4 kHz (-58 to -48 dBFS), a 50 or 60 Hz hum with three
    harmonics (-56 to -44 dBFS) and clicks of a clock or relay. Levels here and in the other
    places are RMS in dBFS against a full-scale sine, drawn from `rng`.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(int(seconds * SR),)``.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.
    """
    n = int(seconds * SR)
    t = np.arange(n) / SR
    tone = pink(n, rng)
    b, a = signal.butter(2, rng.uniform(1500, 4000) / (SR / 2))
    tone = signal.lfilter(b, a, tone)
    x = _normalise(tone, rng.uniform(-58, -48)).astype(np.float64)
    mains = rng.choice([50.0, 60.0])
    hum = sum(_db(-12 * k) * np.sin(2 * np.pi * mains * (k + 1) * t + rng.uniform(0, 6.3))
              for k in range(4))
    x += _normalise(hum, rng.uniform(-56, -44))
    # soft clicks: a clock, a fridge relay
    period = rng.uniform(0.7, 1.6)
    click = np.exp(-np.arange(160) / 20.0) * rng.standard_normal(160)
    for start in np.arange(rng.uniform(0, period), seconds, period):
        if rng.random() < 0.6:
            i = int(start * SR)
            seg = click[: max(0, min(160, n - i))]
            x[i:i + seg.size] += seg * _db(rng.uniform(-50, -40))
    return x.astype(np.float32)


def _talker(n: int, rng: np.random.Generator) -> np.ndarray:
    t = np.arange(n) / SR
    f0 = rng.uniform(95, 240) * (1 + 0.08 * np.sin(2 * np.pi * rng.uniform(0.2, 0.6) * t
                                                   + rng.uniform(0, 6.3)))
    f0 *= 1 + 0.01 * rng.standard_normal(n).cumsum() / np.sqrt(n)
    phase = np.cumsum(f0 / SR)
    pulses = np.diff(np.floor(phase), prepend=0.0)
    src = signal.lfilter([1.0], [1, -0.97], pulses)
    src += 0.02 * rng.standard_normal(n)
    out = np.zeros(n)
    pos = 0
    while pos < n:
        dur = int(SR * rng.uniform(0.12, 0.3))
        seg = src[pos:pos + dur]
        formants = VOWELS[rng.integers(len(VOWELS))] * rng.uniform(0.9, 1.15)
        y = np.zeros(seg.size)
        for k, f in enumerate(formants):
            bw = 60 + 40 * k
            r = np.exp(-np.pi * bw / SR)
            a = [1, -2 * r * np.cos(2 * np.pi * f / SR), r * r]
            y += _db(-6 * k) * signal.lfilter([1 - r], a, seg)
        env = np.sin(np.pi * np.linspace(0, 1, seg.size)) ** 0.7
        out[pos:pos + seg.size] = y * env
        pos += dur + int(SR * rng.uniform(0.0, 0.12) * (rng.random() < 0.35))
    return out


def voices(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """`seconds` of babble: two to five talkers at -30 to -20 dBFS together, over faint pink noise.

    Each talker is a glottal pulse train with a drifting pitch through vowel formant filters,
    in syllables of 0.12 to 0.3 s with the odd pause.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(int(seconds * SR),)``.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.
    """
    n = int(seconds * SR)
    talkers = int(rng.integers(2, 6))
    x = np.zeros(n)
    for _ in range(talkers):
        x += _talker(n, rng) * _db(rng.uniform(-8, 0))
    x = _normalise(x, rng.uniform(-30, -20)).astype(np.float64)
    x += _normalise(pink(n, rng), rng.uniform(-55, -45))
    return x.astype(np.float32)


def traffic(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """`seconds` of road traffic: low rumble with vehicles passing by every 1.5 to 5 s.

    The rumble is low-passed brown noise (-34 to -26 dBFS); each pass-by is band-limited tyre
    noise and an engine tone of five partials whose pitch falls by up to 12 per cent as it
    passes (a small Doppler glide), under a bell-shaped envelope.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(int(seconds * SR),)``.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.
    """
    n = int(seconds * SR)
    t = np.arange(n) / SR
    b, a = signal.butter(2, rng.uniform(250, 500) / (SR / 2))
    x = _normalise(signal.lfilter(b, a, brown(n, rng)), rng.uniform(-34, -26)).astype(np.float64)
    # pass-bys
    next_t = rng.uniform(-2.0, 1.0)
    while next_t < seconds:
        centre = next_t + rng.uniform(1.0, 2.5)
        width = rng.uniform(0.6, 1.8)
        env = 1.0 / (1.0 + ((t - centre) / width) ** 2)
        b, a = signal.butter(2, [rng.uniform(150, 400) / (SR / 2), rng.uniform(1800, 4500) / (SR / 2)],
                             btype="band")
        tyre = signal.lfilter(b, a, rng.standard_normal(n))
        f_eng = rng.uniform(40, 110)
        glide = 1 + 0.06 * np.tanh(-(t - centre) / width)
        engine = sum(_db(-5 * k) * np.sin(2 * np.pi * np.cumsum(f_eng * (k + 1) * glide) / SR)
                     for k in range(5))
        car = _normalise(tyre + 0.6 * engine / 3, rng.uniform(-22, -14)) * env
        x += car
        next_t += rng.uniform(1.5, 5.0)
    return x.astype(np.float32)


def machinery(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """`seconds` of a workshop: motor harmonics, a gear whine, broadband noise, periodic impacts.

    A 25 to 100 Hz motor with 24 partials and a slow wobble, a 0.9 to 4 kHz whine with a 3 Hz
    vibrato, band noise from 500 Hz to 6 kHz, and a filtered impact every 0.25 to 0.9 s.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(int(seconds * SR),)``.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.
    """
    n = int(seconds * SR)
    t = np.arange(n) / SR
    f0 = rng.uniform(25, 100)
    wobble = 1 + 0.004 * np.sin(2 * np.pi * rng.uniform(0.1, 0.5) * t)
    ph = 2 * np.pi * np.cumsum(f0 * wobble) / SR
    motor = sum(_db(-2.5 * k) * np.sin((k + 1) * ph + rng.uniform(0, 6.3)) for k in range(24))
    x = _normalise(motor, rng.uniform(-28, -20)).astype(np.float64)
    fw = rng.uniform(900, 4000)
    whine = np.sin(2 * np.pi * np.cumsum(fw * (1 + 0.003 * np.sin(2 * np.pi * 3 * t))) / SR)
    x += _normalise(whine, rng.uniform(-36, -26))
    b, a = signal.butter(2, [500 / (SR / 2), 6000 / (SR / 2)], btype="band")
    x += _normalise(signal.lfilter(b, a, rng.standard_normal(n)), rng.uniform(-40, -32))
    period = rng.uniform(0.25, 0.9)
    hit = np.exp(-np.arange(1200) / rng.uniform(80, 300))
    hit = hit * signal.lfilter(*signal.butter(2, rng.uniform(1500, 5000) / (SR / 2)),
                               rng.standard_normal(1200))
    for start in np.arange(rng.uniform(0, period), seconds, period):
        i = int(start * SR)
        seg = hit[: max(0, min(hit.size, n - i))]
        x[i:i + seg.size] += seg * _db(rng.uniform(-22, -12)) * 3
    return x.astype(np.float32)


PLACES = {"quiet_room": quiet_room, "voices": voices, "traffic": traffic,
          "machinery": machinery}


def clip(place: str, seconds: float, seed: int) -> np.ndarray:
    """`seconds` of `place`, bit-identical for the same seed; peaks kept below full scale.

    Parameters
    ----------
    place : str
        One of the four places.
    seconds : float
        Length.
    seed : int
        The seed.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    rng = np.random.default_rng([seed, list(PLACES).index(place)])
    x = PLACES[place](seconds, rng)
    peak = float(np.max(np.abs(x))) if x.size else 0.0
    if peak > 0.95:
        x = x * np.float32(0.95 / peak)
    return x.astype(np.float32)


# --- moments that real places have: short sounds from elsewhere, and sounds of no place ----
def door(rng: np.random.Generator) -> np.ndarray:
    """A door closing (about 0.6 s): a low thud, then the latch's rattle.

    Parameters
    ----------
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    n = int(0.6 * SR)
    t = np.arange(n) / SR
    thud = np.sin(2 * np.pi * rng.uniform(55, 90) * t) * np.exp(-t / rng.uniform(0.05, 0.09))
    b, a = signal.butter(2, [rng.uniform(1500, 2500) / (SR / 2), 6500 / (SR / 2)], btype="band")
    rattle = signal.lfilter(b, a, rng.standard_normal(n)) * np.exp(-np.maximum(t - 0.08, 0) / 0.06)
    rattle[: int(0.08 * SR)] = 0.0
    return _normalise(thud + 0.5 * rattle, rng.uniform(-24, -18))


def _excerpt(place: str, seconds: float, dbfs: float, rng: np.random.Generator) -> np.ndarray:
    """A short stretch of another place's sound, faded in and out (a half sine)."""
    x = PLACES[place](seconds, rng).astype(np.float64)
    return _normalise(x * np.sin(np.pi * np.linspace(0.0, 1.0, x.size)), dbfs)


def laugh(rng: np.random.Generator) -> np.ndarray:
    """A group laughing in the corridor (1.2 s of voices).

    Parameters
    ----------
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    return _excerpt("voices", 1.2, rng.uniform(-31, -29), rng)


def passing_car(rng: np.random.Generator) -> np.ndarray:
    """One car passing close by (0.8 s of traffic).

    Parameters
    ----------
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    return _excerpt("traffic", 0.8, rng.uniform(-31, -29), rng)


def drill(rng: np.random.Generator) -> np.ndarray:
    """A drill from the room next door (0.8 s of machinery).

    Parameters
    ----------
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    return _excerpt("machinery", 0.8, rng.uniform(-23, -21), rng)


def alarm(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """An invented alarm: groups of three 2.9 kHz beeps with a 700 Hz undertone, belonging
    to none of the four places.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    n = int(seconds * SR)
    t = np.arange(n) / SR
    f = rng.uniform(2700, 3100)
    tone = np.sin(2 * np.pi * f * t) + 0.3 * np.sin(2 * np.pi * 0.24 * f * t)
    period, on = 1.2, 0.12
    phase = t % period
    gate = ((phase < 3 * 0.2) & ((phase % 0.2) < on)).astype(np.float64)
    gate = signal.lfilter(np.ones(40) / 40, [1.0], gate)  # soft edges, no clicks
    return _normalise(tone * gate, rng.uniform(-20, -14))


def melody(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """An invented ring melody: plucked tones on a pentatonic scale, each with a few
    harmonics and an exponential decay.

    Parameters
    ----------
    seconds : float
        Length of the sound.
    rng : numpy.random.Generator
        The seeded generator.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    """
    n = int(seconds * SR)
    x = np.zeros(n)
    scale = 523.25 * 2 ** (np.array([0, 2, 4, 7, 9, 12]) / 12)
    pos = 0
    while pos < n:
        dur = int(SR * rng.choice([0.15, 0.3]))
        f = rng.choice(scale)
        t = np.arange(min(dur, n - pos)) / SR
        note = sum(0.5 ** k * np.sin(2 * np.pi * f * (k + 1) * t) for k in range(4))
        x[pos:pos + t.size] = note * np.exp(-t / 0.12)
        pos += dur
    return _normalise(x, rng.uniform(-22, -16))


EVENTS = {"door": door, "laugh": laugh, "passing_car": passing_car, "drill": drill}
