"""Plugins: plant models, controllers and reference generators.

A plugin is one module holding ``DECLARATION`` (a :class:`hilrig.plugins.base.Declaration`) and
``@njit(cache=True)`` kernels that work on preallocated float64 arrays. See docs/plugins.md.
"""
