"""The one error of reading an NWB file for import, shared by the readers of its parts."""

__all__ = ["NwbImportError"]


class NwbImportError(ValueError):
    """The NWB file lacks what an import needs, or holds it in a form placeloop cannot read."""
