"""Configuration: typed schemas, composing config groups, option checks, the command line's records."""
