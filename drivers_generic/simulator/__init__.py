"""The simulated electrometer: the far end of the wire, for the demo, replay and tests.

``chargebook simulate`` runs it as a process of its own (:mod:`.app`): the profile's dialect on a
real pseudo-terminal (:mod:`.serial_server`, :mod:`.dialect`), SCPI on a loopback TCP socket
(:mod:`.scpi_server`), and a control socket standing in for the linac and the bench
(:mod:`.control`). Behind them one instrument (:mod:`.device`) and one chamber (:mod:`.physics`,
the simulator's own physics, independent of ``chargebook.corrections``), or a recorded log
(:mod:`.playback`).

Readings depend only on the seed and on the sequence of physical events (deliveries, bias
changes), never on wall-clock timing: noise, spikes and drift are drawn per delivery from
``numpy.random.default_rng(seed)``; settling counts MU, not seconds. Leakage (1e-5 nC/s over
simulated time) is the only timing-dependent term, far below the last digit of a reading.
"""
