"""factorize-weights."""
