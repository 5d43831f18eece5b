"""Hand-off of a skill to a real joint impedance controller (ROS-free core).

``envelope``: the safety envelope on the command stream (soft start, clamps, watchdogs, stop);
``fake_hardware``: the simulator behind a controller's command interface with injectable faults;
``gate``: which skill versions may be sent to hardware. Import the names from those modules.
"""
