"""Tenfold's napari plugin: reader, writer, sample data and the analysis and plots docks.

Everything here only wires napari layers and Qt widgets to :mod:`tenfold.analysis`; no analysis happens in
this package. The manifest is ``napari.yaml`` next to this file.
"""

__all__: list[str] = []
