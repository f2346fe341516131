"""Slow, obviously-correct twins of the engine's stages.

Each function here computes the same quantity as a fast engine routine, written the
plainest way: explicit loops over hops, explicit DFT sums, dense matrices, ``np.interp``
per column. They are for tests only; their speed does not matter.

Modules: :mod:`.stft_loop`, :mod:`.deshape_interp`, :mod:`.dense_hmm`,
:mod:`.preprocess_loop`, :mod:`.quality_loop`.
"""
