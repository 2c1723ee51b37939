"""The local browser app: a server on 127.0.0.1 and the static page it serves.

The app adds no signal processing of its own: every request calls a function
of :mod:`roomcorr.app`, the layer the command line uses too.
"""
