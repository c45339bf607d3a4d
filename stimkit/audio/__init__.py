"""Audio side: streaming reader and per-frame features of a recording.

Modules
-------
- :mod:`~stimkit.audio.read` -- ``audio_info``, ``iter_blocks`` (streaming blocks, mono mix,
  resampling, NaN/Inf -> 0), ``StreamResampler``.
- :mod:`~stimkit.audio.loudness` -- BS.1770-4 / EBU R 128 meter (momentary, short-term, integrated,
  LRA, max M/S, sample and true peak), streaming.
- :mod:`~stimkit.audio.spectral` -- streaming STFT, centroid, bandwidth, roll-off, flatness, flux.
- :mod:`~stimkit.audio.rhythm` -- onset strength, onsets, onset rate, local tempo, pulse clarity.
- :mod:`~stimkit.audio.tonal` -- chroma, local key and key strength, harmonic change, roughness.
- :mod:`~stimkit.audio.silence` -- silent segments of a level curve or of a file.
- :mod:`~stimkit.audio.pipeline` -- ``compute_features`` / ``features_from_array`` ->
  ``FeatureResult``; ``write_features``; ``summary_table``.

All times are ``recording`` seconds (from the first sample of the file); a frame's time is its
window centre.
"""
