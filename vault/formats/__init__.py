"""Bytes in and out (EDF/BDF, EEG-BIDS, score files, strict JSON); no vault state, no keys."""
