"""Pure numerical core of edgevib: arrays in, small typed results out; no I/O, logging or global state."""
