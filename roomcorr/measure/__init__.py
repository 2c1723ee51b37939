"""measure stage of roomcorr (see DEVELOPERS.md for the data flow)."""
