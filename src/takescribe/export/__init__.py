"""Notes to files and back: Standard MIDI Files and note lists."""

