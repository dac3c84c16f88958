"""The live monitor: a local web page fed by the loop's state stream."""
