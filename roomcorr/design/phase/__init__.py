"""The phase of the filters: minimum phase, the measured excess phase, mixed-phase FIRs."""
