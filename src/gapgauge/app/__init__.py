"""The application layer: one module per job; each opens the store once, calls the pure functions of
compare/ and sim/, saves the typed result and returns it."""
