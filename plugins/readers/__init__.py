"""Readers: plugins that list and read the frames of instrument files and archives."""
