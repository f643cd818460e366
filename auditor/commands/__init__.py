"""Commands: one module per command; each assembles results and hands them to a renderer."""
