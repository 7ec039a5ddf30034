"""Simulation: plants by env id, perturbations, random streams, batched rollouts, loop quality and executors."""
