"""What a terminal receives: the link budget (``link``), counter-based randomness (``noise``),
the measurement rows every policy reads (``measure``) and the terminal's antenna hardware
(``hardware``)."""
