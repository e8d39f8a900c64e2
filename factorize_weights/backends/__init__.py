"""Model-format backends. Each knows one format and nothing else (see DESIGN.md)."""
