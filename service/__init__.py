"""Capnote: structured, checked FHIR R4 records of Nd:YAG posterior capsulotomy."""
