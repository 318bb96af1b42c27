"""The ``new-plugin`` command and the templates it fills in."""
