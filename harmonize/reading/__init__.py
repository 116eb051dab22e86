"""Reading provider files: text, field coercion, quarantine, taxon names."""
