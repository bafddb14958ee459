"""mir_eval-convention matching and metrics."""

