"""Placeholder: filled in by its family's author."""

__all__: list[str] = []
