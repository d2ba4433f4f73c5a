"""crackstack pipeline: section-topograph series -> 3D volume -> defects -> break-risk assessment.

Stages (one module each): ``ingest``, ``correct``, ``register``, ``reconstruct``, ``segment``,
``measure``, ``assess``, ``report``; shared ``geometry``, ``config`` and ``runfolder``.
"""

__version__ = "0.1.0"
