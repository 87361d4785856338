//! Practice scans of our own: a machine shop's mixed-parts bin seen by a simulated depth sensor.
