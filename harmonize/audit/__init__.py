"""Coverage audit: metrics in SQL, findings, report."""
