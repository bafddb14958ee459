"""Score time to take time: chroma and onset DTW, pauses and jumps back."""

