"""Sampled instruments for the bench: Debian's ``fluidsynth`` with a General MIDI soundfont.

The performed note list of :func:`stimkit.render.performance.perform` is written to a Standard
MIDI File with exact timing (tempo 1 000 000 us per quarter note, 25 000 ticks per quarter
note: one tick is 40 us) and rendered by the ``fluidsynth`` command line (``-ni -F``, its own
reverb and chorus off); the hall and audience of :mod:`stimkit.render` may be added afterwards.
The ground truth is the note-on time written to the file (a sampled instrument's own attack and
any silence at the start of its samples are part of what an aligner must cope with).

Soundfonts (install with ``apt-get install fluidsynth fluid-soundfont-gm timgm6mb-soundfont``):

- ``timgm6mb`` -- ``/usr/share/sounds/sf2/TimGM6mb.sf2``: **development** material; tune on it.
- ``fluidr3`` -- ``/usr/share/sounds/sf2/FluidR3_GM.sf2``: **held out**; measure on it, never
  tune on it (its renders stand in for the "other synthesizer" of the hidden checks).

General MIDI programs per timbre (GM 1 sound set): piano 0, organ 19 (church organ), bowed strings by
range (violin 40, viola 41, cello 42, contrabass 43), voice 52 (choir aahs), clarinet 71,
flute 73, horn 60. Channel 10 (percussion) is never used.
"""

from __future__ import annotations

import shutil
import struct
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import soundfile as sf

SOUNDFONTS = {"timgm6mb": Path("/usr/share/sounds/sf2/TimGM6mb.sf2"),
              "fluidr3": Path("/usr/share/sounds/sf2/FluidR3_GM.sf2")}
HELD_OUT = {"fluidr3"}
PPQ = 25000
US_PER_QN = 1_000_000
_PROGRAM = {"piano": 0, "organ": 19, "voice": 52, "clarinet": 71, "flute": 73, "horn": 60}


def available(font: str) -> bool:
    return shutil.which("fluidsynth") is not None and SOUNDFONTS[font].exists()


def _program(timbre: str, mean_pitch: float) -> int:
    if timbre in ("bowed", "strings"):
        return 40 if mean_pitch >= 67 else 41 if mean_pitch >= 58 else 42 if mean_pitch >= 43 else 43
    return _PROGRAM.get(timbre, 0)


def _vlq(n: int) -> bytes:
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append(0x80 | (n & 0x7F))
        n >>= 7
    return bytes(reversed(out))


def write_midi(notes, path, *, timbres: dict) -> None:
    """A type-0 Standard MIDI File of ``notes`` (``onset_s, offset_s, pitch, velocity, part``)."""
    parts = sorted(notes["part"].astype(str).unique())
    chans = [c for c in range(16) if c != 9]
    events = []   # (tick, order, bytes)
    means = notes.groupby(notes["part"].astype(str))["pitch"].mean()
    for k, p in enumerate(parts):
        ch = chans[k % len(chans)]
        events.append((0, 0, bytes([0xC0 | ch, _program(timbres.get(p, "piano"), float(means[p]))])))
        g = notes[notes["part"].astype(str) == p]
        for on, off, pitch, vel in zip(g["onset_s"], g["offset_s"], g["pitch"], g["velocity"]):
            t_on = int(round(on * PPQ))
            t_off = max(int(round(off * PPQ)), t_on + 1)
            v = int(np.clip(round(vel), 1, 127))
            events.append((t_on, 2, bytes([0x90 | ch, int(pitch), v])))
            events.append((t_off, 1, bytes([0x80 | ch, int(pitch), 0])))
    events.sort(key=lambda e: (e[0], e[1]))
    track = bytearray(b"\x00\xFF\x51\x03" + US_PER_QN.to_bytes(3, "big"))
    last = 0
    for tick, _, data in events:
        track += _vlq(tick - last) + data
        last = tick
    track += b"\x00\xFF\x2F\x00"
    Path(path).write_bytes(b"MThd" + struct.pack(">IHHH", 6, 0, 1, PPQ)
                          + b"MTrk" + struct.pack(">I", len(track)) + bytes(track))


def render_sampled(notes, *, font: str, sr: int, timbres: dict, duration_s: float) -> np.ndarray:
    """Render the note list with fluidsynth; mono float32 of ``round(duration_s * sr)`` samples."""
    with tempfile.TemporaryDirectory() as d:
        mid, wav = Path(d) / "p.mid", Path(d) / "p.wav"
        write_midi(notes, mid, timbres=timbres)
        subprocess.run(["fluidsynth", "-ni", "-q", "-R", "0", "-C", "0", "-g", "0.5", "-r", str(sr),
                        "-F", str(wav), str(SOUNDFONTS[font]), str(mid)],
                       check=True, capture_output=True)
        y, got_sr = sf.read(str(wav), dtype="float32", always_2d=True)
    assert got_sr == sr, (got_sr, sr)
    y = y.mean(axis=1)
    n = int(round(duration_s * sr))
    y = np.pad(y, (0, max(0, n - y.size)))[:n]
    pk = float(np.max(np.abs(y))) if y.size else 0.0
    return y / pk * 0.9 if pk > 0 else y


def renderer(font: str):
    """A ``render(case, score, sr=...)`` for :func:`stimkit.render.cases.prepare_case`."""
    from stimkit.render.audience import audience_noise, with_applause
    from stimkit.render.ensemble import _active_rms, timbres_for
    from stimkit.render.performance import perform
    from stimkit.render.room import add_hall

    def render(case, score, *, sr):
        perf = perform(score, seed=case.seed, start_s=2.0, **case.perform)
        perf.notes["onset_s"] = np.rint(perf.notes["onset_s"].to_numpy() * PPQ) / PPQ
        parts = perf.notes["part"].astype(str).unique()
        timbres = timbres_for(parts, override=case.timbres)
        tail = 0.0 if case.hall_rt60_s is None else min(case.hall_rt60_s, 3.0)
        y = render_sampled(perf.notes, font=font, sr=sr, timbres=timbres, duration_s=perf.duration_s + tail)
        if case.hall_rt60_s is not None:
            y = add_hall(y, sr, rt60_s=case.hall_rt60_s, wet=case.hall_wet, seed=case.seed + 2)
        if case.applause:
            y, shift = with_applause(y, sr, seed=case.seed + 3)
            for c in ("onset_s", "offset_s"):
                perf.notes[c] = perf.notes[c] + shift
        if case.audience:
            y = y + audience_noise(y.size, sr, seed=case.seed + 3, music_rms=_active_rms(y),
                                   mains_hz=case.mains_hz)
            y = y / max(1.0, float(np.max(np.abs(y))) / 0.98)
        perf.settings.update({"synth": f"fluidsynth {font}", "timbres": timbres})
        return y.astype(np.float32), perf

    return render
