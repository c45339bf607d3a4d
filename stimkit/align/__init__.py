"""Score-to-recording alignment: score templates, audio chroma, multiscale DTW, warping."""
