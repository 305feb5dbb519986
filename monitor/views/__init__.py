"""The terminal screen (Textual): the only part of spinrig that imports textual. It renders the
engine's snapshots and computes no spectra itself."""
