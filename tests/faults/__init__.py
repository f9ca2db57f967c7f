"""The fault matrix: one test per fault the simulator (or the world) can inject."""
