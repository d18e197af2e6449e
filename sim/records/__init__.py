"""Run records: the tapes, the recorder process, run folders and their readers, HDF5 and
exports, manifests and signatures, compare and rerun.

Public names are read from plantrig.sim."""
