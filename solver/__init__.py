"""twistrate.solver: pure synchronous numpy kinematics and rate resolution (no I/O, no clock, no globals)."""
