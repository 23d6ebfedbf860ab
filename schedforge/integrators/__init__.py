"""Integrators for the master equation, registered by name in :mod:`schedforge.dynamics`."""
