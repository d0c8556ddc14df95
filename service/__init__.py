"""twistrate.service: the process (config, wire codec, tick, state machine, sockets, simulated arm, CLI)."""
