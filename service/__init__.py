"""Capnote: structured, checked FHIR R4 records of Nd:YAG posterior capsulotomy."""

__version__ = "0.1.0"
