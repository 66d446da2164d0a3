"""The run machinery: the config, the `Simulation` and its time loop, statistics hooks,
output files, checkpoints, the run log, and the scales and memory predicted from a config.

It sits on the fluid core and plugs in the forcing and the particles; it never imports the
study tools or the command line."""
