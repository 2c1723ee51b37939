"""What to correct: the target curve, the listening-area design and the correction curve."""
