"""Placement: the room's layout, the causes of peaks and dips, prediction and suggestions.

* :mod:`roomcorr.placement.layout`: the layout file (room size, loudspeakers, seat,
  measured positions).
* :mod:`roomcorr.placement.causes`: a physical cause for each peak and withheld dip.
* :mod:`roomcorr.placement.model`: the room model (the image-source sum of
  :mod:`roomcorr.physics`) calibrated on the measurements and its predictions at other
  seats and loudspeaker positions.

The search over loudspeaker and seat positions (``roomcorr advise``) is in
:mod:`roomcorr.app.placement`: it designs each candidate through the design's own code.
"""
