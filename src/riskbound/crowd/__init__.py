"""Synthetic crowds: social force pedestrians on branching routes, from scenario files to bags."""
