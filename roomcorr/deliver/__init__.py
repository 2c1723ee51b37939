"""Writers of a design's deliverables: filter formats, routes (see DESIGN.md)."""
