"""spinrig host application: link, assembler, engine, detectors, analysis and views."""

__version__ = "0.1.0"
