"""From a curve to filters that are safe to play: FIR, biquads and their fit, the safety gate."""
