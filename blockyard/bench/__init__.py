"""Benchmarks: blockyard's training loop against a hand-written PyTorch loop and this machine's limits.

One module per job: ``peaks`` (GEMM / copy ceilings, machine facts), ``plain`` (the hand-written
reference loop), ``cases`` (the blockyard configs timed and how one is run), ``scan`` (the scan
against the bandwidth floor), ``profile`` (one step's time by block kind), ``paired`` (two configs'
steps alternated, median ratio with a 95% interval), ``speed`` (the whole
speed benchmark), ``quality`` (fp32 vs bf16 final loss, paired by seed), ``targets``, ``report``
(the text), ``command`` (``blockyard bench``), ``decode`` (decode tokens/s and state bytes vs context).
Memory lives in ``scripts/bench_memory.py``.
"""
