"""Batches for the analyst: many notes or FHIR resources, checked or emitted in one pass.

    inputs     files, folders and standard input -> an ordered stream of records
    checking   record -> result (findings, and for a whole note file what follows); Tally
    identity   a record's identifier; the note identifiers met so far
    listing    results -> standard output (text, NDJSON, or a Bundle of OperationOutcomes)
    output     what reports share: the atomic file, the facts of the run, a row per finding
    reports    the report a file name asks for: report_html (report_parts, report_style)
               or report_csv
    emitting   note records -> one compact Bundle per line and note id; errors skipped

Everything streams: memory holds one record and counters, never the results (and under 100
bytes a note for the identifiers met). Nothing here knows of the command line; capnote.cli
calls it.
"""
