"""fieldrun simulators: the simulated cathode (physics), simulated instruments and the
loopback SCPI server. Imports ``drivers`` (transport interface, clocks) and
``sequencer.physics`` (equations only); nothing imports this package except the one place
that builds a simulated rig from a rig file (``sequencer.stand``)."""
