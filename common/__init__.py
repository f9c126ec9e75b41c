"""Modules the daemon, the simulator and the numerical core share: the block wire format (``wire``) and the
frequency-band rules of an analysis plan (``bands``).  Nothing here does I/O or imports another edgevib package."""
