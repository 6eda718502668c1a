"""Note -> FHIR R4 resources; OperationOutcome; payload validation for analysts."""
