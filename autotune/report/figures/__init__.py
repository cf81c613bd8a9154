"""The report's figures, one module per kind."""
