"""Recordings of other programs in and out: NWB import and export, decoded steps as tables."""
