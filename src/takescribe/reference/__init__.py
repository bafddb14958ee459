"""The reference part: MusicXML (safe XML, .mxl) and MIDI parts as notes in score time."""

