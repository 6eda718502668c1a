"""The note contract (pydantic models) and its generated JSON Schema."""

from schemas.note import Note

__all__ = ["Note"]
