"""The demo notes, shipped in the wheel as capnote.demo (see pyproject.toml)."""
