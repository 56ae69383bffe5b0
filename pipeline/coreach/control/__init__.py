"""One control step, shared by demonstrations, training replay, vetting and the runtime: safety filter and belief cadence."""
