"""Demo data generators, one module per source kind.

Each module defines ``generate(folder: Path, rng: numpy.random.Generator) -> list[DemoInput]``
that writes its profile(s) into ``folder/profiles`` and messy input files into
``folder/data/<kind>/``, and returns the ingests to run, in order.
"""
