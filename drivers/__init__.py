"""Hardware behind small async interfaces: cameras, motion controllers, the simulated scope."""
