"""`make bench`: knowngood against simple peers on elpv and the demo parts, plus speed and memory figures."""
