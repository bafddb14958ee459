"""The jobs, glued from the stages: transcribe, compare, evaluate, batch, demo."""

