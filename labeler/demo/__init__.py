"""The invented demo scenario and the simulated annotator."""
