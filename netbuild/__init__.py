"""netbuild: compiles speech-recognition decoding graphs from a lexicon, an ARPA
language model, a context map and HMM topologies into optimized WFSTs."""

__version__ = "0.1.0"
