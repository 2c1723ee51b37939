"""Sound through a design: offline and streamed rendering, loudness, real-time listening.

``render`` reads a design's routes and filters and convolves audio through them
(block by block, memory independent of the file's length); ``loudness``
measures ITU-R BS.1770 integrated loudness (through pyloudnorm);
``realtime`` holds the partitioned convolver and the switch with its
cross-fade; ``device`` is the only module that opens an audio device.
"""
