"""Jogging an arm from a six-axis hand controller or the keyboard (`twistrate teleop`).

Layers, each testable without hardware:

* `events`   - the raw input event model (type, code, value, time) and the Linux input codes used;
* `device`   - the device stage: latching deflections and buttons from any event source;
* `evdev_source` - the Linux evdev event source, device listing and permission explanations;
* `keyboard` - press-and-hold keys in a terminal, fed into the pipeline after the device stage;
* `axes`, `one_euro`, `pipeline` - the axis pipeline from raw counts to a tool twist;
* `profile`  - the TOML profile (device mapping and pipeline constants);
* `session`  - the teleoperation state machine against an abstract link.
"""
