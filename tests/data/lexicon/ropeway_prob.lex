# Ropeway lexicon with pronunciation probabilities (second field).
cabin   0.7  k a b i n
cabin   0.3  k e b i n
tower   1.0  t a u e r
summit  0.6  s u m i t
summit  0.4  s a m i t
