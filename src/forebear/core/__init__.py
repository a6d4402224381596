"""The ground floor: the spec (YAML -> validated :class:`Spec`), the space, the YAML reader, the defaults.

Nothing here imports another part of forebear.
"""
