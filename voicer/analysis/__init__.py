"""Analysis of recordings: audio input, onsets, partials (f0, B), decays, and the fit of a preset."""
