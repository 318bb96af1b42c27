"""Built-in grainhabit plugins: each module is one capability behind a hook."""
