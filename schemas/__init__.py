"""The contract as data: Table Schema JSON (Frictionless Data) files shipped with harmonize."""
