"""What ``apply`` may write: its output sample formats and the peak a clipping render is
lowered to.

Constants only, with no imports: the command line's help text shows them without loading
the renderer (and with it scipy and the route plans) at start-up.
"""

#: Output sample formats ``apply`` writes (libsndfile subtype names).
SUBTYPES = ("FLOAT", "DOUBLE", "PCM_24")
#: A rendering whose sample peak exceeds full scale is lowered to this peak (dBFS);
#: 1 dB of room for peaks between samples (common practice, from memory).
LOWERED_PEAK_DBFS = -1.0
