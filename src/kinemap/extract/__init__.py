"""Extraction from a cube: spectra (``extract_spectrum``) and position-velocity diagrams
(``pv_diagram``).  Reads no files itself beyond what the reader and region files give."""
