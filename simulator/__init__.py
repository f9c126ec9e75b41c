"""Simulated accelerometer streams with analytic truth (never imports edgevib.pipelines).

Modules
-------
``models``      shaft speed profiles, bearing kinematics, impact response, sensor responses, severity curves,
                ISO 20816-3 zones (our own copy of the table).
``scenario``    TOML scenarios → frozen specs, validated with key paths (schema in its docstring);
                packaged scenarios in ``scenarios/*.toml`` (``edgevib simulate --list``).
``engine``      :class:`~edgevib.simulator.engine.Simulation`: blocks, truth, daemon configuration.
``publishers``  MQTT (paho), OPC UA server (asyncua), WAV files, the paced streaming loop (topics and node ids
                in its docstring).
``cli``         ``edgevib simulate``.

Signal models
-------------
* Speed: constant, ramp, piecewise schedule (run-up, coast-down, stop/restart), slow sinusoidal wander; phases
  are the closed-form integral of the speed.
* Tonal faults, amplitudes as velocity r.m.s. on a gain-1 axis at the machine's reference speed (velocity ∝
  speed): residual 1× (+0.3 at 2×); imbalance 1× (axis gains h 1, v 0.8, axial 0.3); misalignment 2× with
  0.5 at 1× and 0.3 at 3× (axial 1, h 0.6, v 0.5); looseness: a truncated waveform of harmonics and 0.5×
  sub-harmonics, represented exactly by its Fourier series; cage: FTF (with slip) and two harmonics; gear mesh:
  teeth × 1× in g r.m.s. with ±k× sidebands.
* Bearing defects: impacts at BPFO / BPFI / 2×BSF (kinematic, FIELD_NOTES §2) less a slip fraction (default
  1 %), each impact's position jittered (default 1.5 % of the interval, Antoni & Randall's model), amplitude
  spread 10 %, inner race modulated at 1× and rolling element at FTF (load zone); each impact rings the point's
  structural resonance (zero-mean decaying resonance with a smooth onset); amplitude ∝ speed².
* Process noise: white, coloured by the structural resonance, ∝ speed (silent when stopped).
* Sensors: piezo IEPE (first-order high-pass 0.5 Hz — no DC — and the rise to a 25 kHz mounted resonance,
  5 µg/√Hz, ±50 g, 24-bit), MEMS (DC response with 1 g on a vertical axis, Butterworth band limit, 100 µg/√Hz,
  ±8 g, 16-bit quantization).  Sensor faults: flatline, clipping, bias shift, cable fault (rail episodes),
  spikes, dropped blocks (sequence numbers skipped).  Progression: a multiplier curve (linear, exponential,
  logistic) per fault.

Truth (``Simulation.truth(t_s)``, ``edgevib simulate --truth``)
---------------------------------------------------------------
``{"scenario", "site", "seed", "t_s", "t_ns", "t0_ns", "notes", "machines": {id: {...}}, "points": {id: {...}}}``;
per point: ``velocity_rms_mm_s`` (ISO band ``velocity_band_hz``), ``acceleration_rms_g`` (AC, 0..fs/2),
``mean_g``, ``orders_mm_s`` (0.5/1/2/3×), ``speed_rpm``, ``running``, ``iso`` (group, support, zone,
boundaries), ``expected_state`` (normal | alert | danger | stopped | sensor-fault; alert = zone C, danger =
zone D), ``fault`` / ``stage`` (the most severe) and ``faults`` (each with its stage, multiplier and curve),
``sensor_fault`` (active ones or null), ``truth_exact`` (false where a sensor fault makes the value
non-analytic: clipping, cable fault, spikes), ``defect_frequencies_hz`` / ``defect_orders`` (kinematic) and
``impacts`` (actual impact rate with slip), and for progressing points ``progression`` (curves, a 61-row
timeline and the ISO ``zone_changes`` with their times).  Values are expectations of the stationary model at
``t_s`` computed from the model parameters: tonal lines and impact-train line spectra (with jitter, spread,
modulation and aliasing) plus noise PSDs integrated over frequency, all through the sensor FIR's exact response.
"""
