"""Digital signal processing of the samples: blocks, the frequency-switching schedule, channelizers, the spectrometer that accumulates power per phase."""
