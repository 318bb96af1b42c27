"""Invented synthetic fields rendered from 3-D crystal shapes, and the demo command."""
