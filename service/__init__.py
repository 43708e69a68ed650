"""lytestream: FHIR lab results in, FHIR Flags out."""

__version__ = "0.1.0"
