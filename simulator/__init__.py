"""Simulated incubation chambers: physics, community metabolism, sensors, faults and the
protocol endpoints (Modbus TCP, serial optode) that make them look like real hardware."""
