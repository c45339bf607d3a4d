"""Synthesized test signals shared by the audio tests (no recordings needed)."""

import numpy as np

SR = 22050


def clicks(bpm, *, seconds=12.0, sr=SR, start_s=0.2):
    """A click track: 30 ms decaying 1.5 kHz clicks every beat."""
    y = np.zeros(int(seconds * sr))
    n = int(0.03 * sr)
    tt = np.arange(n) / sr
    c = np.sin(2 * np.pi * 1500 * tt) * np.exp(-tt * 150) * 0.5
    for b in np.arange(start_s, seconds - 0.1, 60.0 / bpm):
        i = int(b * sr)
        y[i:i + n] += c[: len(y[i:i + n])]
    return y


def drum_pattern(bpm, *, seconds=12.0, sr=SR, seed=0, hats_only=False):
    """Kick on beats 1 and 3, snare on 2 and 4, closed hat on every beat (only the hats with
    ``hats_only``)."""
    rng = np.random.default_rng(seed)
    y = np.zeros(int(seconds * sr))
    n = int(0.15 * sr)
    tt = np.arange(n) / sr
    kick = np.sin(2 * np.pi * np.cumsum(60 + 80 * np.exp(-tt * 30)) / sr) * np.exp(-tt * 20)
    snare = rng.standard_normal(n) * np.exp(-tt * 35) * 0.5
    hat = rng.standard_normal(n) * np.exp(-tt * 120) * 0.12
    for k, b in enumerate(np.arange(0.2, seconds - 0.3, 60.0 / bpm)):
        i = int(b * sr)
        seg = slice(i, i + n)
        m = len(y[seg])
        y[seg] += hat[:m] if hats_only else (kick if k % 2 == 0 else snare)[:m] + hat[:m]
    return y * 0.5


def note_sequence(*, n_notes=40, sr=SR, seed=3):
    """Harmonic notes of random pitch, length and level; returns (samples, onset times)."""
    rng = np.random.default_rng(seed)
    onsets = []
    parts = [np.zeros(int(0.3 * sr))]
    for _ in range(n_notes):
        f = 220 * 2 ** (rng.integers(0, 24) / 12)
        d = rng.uniform(0.2, 0.5)
        gap = rng.uniform(0.0, 0.2)
        tt = np.arange(int(d * sr)) / sr
        env = np.minimum(1, tt / 0.005) * np.exp(-tt * 6) * np.minimum(1, (d - tt) / 0.03)
        tone = sum(np.sin(2 * np.pi * f * h * tt) / h for h in (1, 2, 3, 4)) * env * rng.uniform(0.2, 0.6)
        onsets.append(sum(len(p) for p in parts) / sr)
        parts += [tone, np.zeros(int(gap * sr))]
    parts.append(np.zeros(int(0.5 * sr)))
    return np.concatenate(parts), np.array(onsets)


def chord(pitch_classes, bass_pc, seconds, *, sr=SR):
    """Harmonic tones (5 partials, 1/h) on C4 + pitch class, with a bass on C2 + bass_pc."""
    t = np.arange(int(seconds * sr)) / sr
    y = np.zeros_like(t)
    for pc in pitch_classes:
        f = 261.63 * 2 ** (pc / 12)
        y += sum(np.sin(2 * np.pi * f * h * t) / h for h in range(1, 6)) * 0.08
    fb = 65.41 * 2 ** ((bass_pc % 12) / 12)
    y += sum(np.sin(2 * np.pi * fb * h * t) / h for h in range(1, 6)) * 0.1
    return y * np.minimum(1, t / 0.01) * np.minimum(1, (seconds - t) / 0.05)


def cadence(tonic_pc, mode, *, sr=SR, repeats=2):
    """I-IV-V7-I (major) or i-iv-V7-i (minor, raised leading tone), one second per chord."""
    third = 4 if mode == "major" else 3
    sixth = 9 if mode == "major" else 8
    prog = [([0, third, 7], 0), ([5, sixth, 12], 5), ([7, 11, 14, 17], 7), ([0, third, 7], 0)]
    one = [chord([p + tonic_pc for p in pcs], b + tonic_pc, 1.0, sr=sr) for pcs, b in prog]
    return np.concatenate(one * repeats)


def soft_line(kind="strings", *, seconds=20.0, sr=SR, seed=0, rate_hz=3.5, level=0.3):
    """A legato line of bowed- or sung-like notes with slow attacks; returns (samples, onsets).

    Each note starts while the previous one is still sounding (60 ms overlap, then a 60 ms
    release), rises with a raised-cosine attack of 100-300 ms (soft bowed and sung attacks),
    and carries a 5-6.5 Hz vibrato of 30-50 cents that fades in over 0.3 s. ``kind="strings"``:
    harmonics 1/h (a bowed string's sawtooth-like spectrum); ``kind="voice"``: harmonics weighted
    by three vowel formants (700, 1150, 2700 Hz, an /a/-like vowel). Pitches step by 1-5
    semitones between MIDI 50 and 76; note lengths vary +-30 % around ``1 / rate_hz``.
    """
    rng = np.random.default_rng(seed)
    onsets, t = [], 0.4
    while t < seconds - 1.0:
        onsets.append(t)
        t += rng.uniform(0.7, 1.3) / rate_hz
    onsets = np.array(onsets)
    ends = np.r_[onsets[1:], seconds - 0.3]
    y = np.zeros(int(seconds * sr))
    pitch = 62
    for a, b in zip(onsets, ends):
        pitch = int(np.clip(pitch + rng.choice([-5, -4, -3, -2, -1, 1, 2, 3, 4, 5]), 50, 76))
        f0 = 440.0 * 2 ** ((pitch - 69) / 12)
        dur = (b - a) + 0.06
        tt = np.arange(int(dur * sr)) / sr
        attack = rng.uniform(0.1, 0.3)
        env = 0.5 - 0.5 * np.cos(np.pi * np.minimum(tt / attack, 1.0))
        env *= np.clip((dur - tt) / 0.06, 0.0, 1.0)
        depth = 2 ** (rng.uniform(30, 50) / 1200) - 1
        vib = 1 + depth * np.sin(2 * np.pi * rng.uniform(5.0, 6.5) * tt + rng.uniform(0, 2 * np.pi)) \
            * np.minimum(1.0, tt / 0.3)
        phase = 2 * np.pi * np.cumsum(f0 * vib) / sr
        x = np.zeros(tt.size)
        for h in range(1, 16):
            if f0 * h > sr / 2 - 500:
                break
            if kind == "voice":
                amp = 0.02 + sum(g * np.exp(-0.5 * ((f0 * h - fc) / bw) ** 2)
                                 for fc, bw, g in ((700, 110, 1.0), (1150, 120, 0.5), (2700, 200, 0.25)))
            else:
                amp = 1.0 / h
            x += amp * np.sin(h * phase)
        x *= env * rng.uniform(0.6, 1.0)
        i = int(round(a * sr))
        m = min(x.size, y.size - i)
        y[i:i + m] += x[:m]
    return level * y / np.max(np.abs(y)), onsets
