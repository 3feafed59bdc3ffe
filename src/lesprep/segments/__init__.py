"""Time segments: big or still-running cases split into jobs over consecutive output
times (:mod:`lesprep.segments.plan`), joined again into the per-case stores
(:mod:`lesprep.segments.gather`)."""
