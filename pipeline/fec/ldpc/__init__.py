"""pipeline.fec.ldpc: the CCSDS LDPC codes (131.0-B sec. 7), encoders and a layered min-sum decoder."""
