"""Several loudspeakers together: alignment, crossovers, several subwoofers."""
