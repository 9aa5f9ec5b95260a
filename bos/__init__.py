"""Quantitative background-oriented schlieren (BOS).

The library works on arrays and small dataclasses; file and terminal I/O
lives at the edges (:mod:`bos.store`, :mod:`bos.images`, the ``cli`` package).

Data flow (no module imports one further up the chain)::

    images -> displacement -> deflection -> gradient -> index -> density
           -> temperature / acoustic pressure -> store / plots
"""

__version__ = "0.1.0"
