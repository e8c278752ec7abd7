"""Stage 6, simulation: the event-driven hybrid simulator and validation by re-simulation."""
