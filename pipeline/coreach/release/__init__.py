"""Release: the gate a trained decoder must pass, the bundle and registry version it becomes, and its replay."""
