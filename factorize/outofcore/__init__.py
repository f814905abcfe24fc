"""Out-of-core shrinking: checkpoints too large for memory, read and written one tensor (or one block) at a time.

- :mod:`factorize.outofcore.candidates`: which tensors of a bare checkpoint are linear weights, and their spectra.
- :mod:`factorize.outofcore.writer`: the streamed safetensors writer (header last) and the checkpoint writer that
  puts factors in place of the weights, atomically, sharded or not.
- :mod:`factorize.outofcore.tasks`: the weights-only per-matrix tasks (singular values, factors) run on an engine.
- :mod:`factorize.outofcore.weights_only`: :func:`shrink_checkpoint`, the weights-only streaming shrink.
- :mod:`factorize.outofcore.architecture`, :mod:`~factorize.outofcore.stem`, :mod:`~factorize.outofcore.tokens`,
  :mod:`~factorize.outofcore.block_tasks`, :mod:`~factorize.outofcore.refit_tasks`,
  :mod:`~factorize.outofcore.blockwise`: :func:`shrink_blockwise`, the calibrated shrink of a transformers
  checkpoint (any family with one list of blocks) one block in memory at a time, optionally refitting each block
  to the compressed blocks upstream (see docs/scale.md).
- :mod:`factorize.outofcore.results`: the typed results of both, and their reports.

This layer sits beside :mod:`factorize.pipeline`: it combines spectra, plan, calibrated statistics and the
checkpoint formats, as ``compress`` does in memory. Nothing is imported here, so importing one module does not
pull in the others.
"""
