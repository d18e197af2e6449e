"""The tick engine and running a rig: the staged tick loop, clock and real-time pacing,
operator commands, signal chains, the watchdog rule, outcomes.

Public names are read from plantrig.sim."""
