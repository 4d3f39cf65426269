"""Target profiles: declarative YAML descriptions of an accelerator, and the built-in ones."""
