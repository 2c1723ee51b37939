"""Placement: the room's layout, the causes of peaks and dips, prediction and suggestions.

* :mod:`roomcorr.placement.layout`: the layout file (room size, loudspeakers, seat,
  measured positions).
* :mod:`roomcorr.placement.causes`: a physical cause for each peak and withheld dip.
* :mod:`roomcorr.placement.model`: the room model calibrated on the measurements and
  its predictions at other seats and loudspeaker positions.
* :mod:`roomcorr.placement.advise`: a search over loudspeaker and seat positions.
"""
