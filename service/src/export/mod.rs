//! A fitted model out as text: SPICE subcircuit, Touchstone 1-port, CSV.
