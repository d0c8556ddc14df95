"""twistrate.service: the process. The wire protocol (wire/), the tick pipeline, the runtime, the state
machine, the control plane, the simulated arm, the recorder; commands/ and bench/ stand apart."""
