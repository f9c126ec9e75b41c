"""The alarm layer: limits and baselines, durable outbox, CloudEvents feed, waveform capture, control."""
