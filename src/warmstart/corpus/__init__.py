"""The corpus stage: from an archive of volumes to a normalized, provenance-tracked patch store.

Modules: :mod:`.settings` (what a build is asked to do), :mod:`.sampling` (patch geometry and
filters), :mod:`.resample` (anti-aliased resampling), :mod:`.store` (the zarr store),
:mod:`.build` (the build, resumable and sharded), :mod:`.merge`, :mod:`.manifest`,
:mod:`.report`, :mod:`.scan`.
"""
