"""Simulated accelerometer streams with analytic truth (never imports edgevib.pipelines)."""
