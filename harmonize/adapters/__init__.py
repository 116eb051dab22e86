"""Source adapters: one module per source kind."""
