"""The design stage of roomcorr: from measured responses to filters, in four groups.

- :mod:`roomcorr.design.curve`: what to correct. The target curve and band
  (``target``), the listening-area level, band edges and bass limit (``area``)
  and the correction curve with its boost rules (``correction``).
- :mod:`roomcorr.design.phase`: the phase of the filters. Minimum phase from a
  magnitude (``minphase``), the measured excess phase (``excess_phase``) and the
  mixed-phase FIR that corrects part of it (``mixedphase``).
- :mod:`roomcorr.design.system`: several loudspeakers playing together. Delays,
  levels and polarity (``align``), crossovers and the search for the best one
  (``crossover``) and several subwoofers chosen together (``subwoofers``).
- :mod:`roomcorr.design.realise`: turning a curve into filters that are safe to
  play. FIR synthesis (``fir``), biquad sections (``biquad``) and their fit
  (``iir_fit``), and the safety gate: peak gain, boost cap, pre-gain (``safety``).

Every module holds pure functions on numpy arrays (no file or device access);
:mod:`roomcorr.pipeline` runs them in order.
"""
