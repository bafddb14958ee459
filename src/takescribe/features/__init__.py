"""Time-frequency features of a take: the equalised variable-Q spectrogram."""

