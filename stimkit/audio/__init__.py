"""Audio side: streaming block reader and per-frame features (loudness, rhythm, spectral, tonal, silence)."""
