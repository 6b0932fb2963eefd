"""The content line: does the exhibit show the registered picture, judged by its content alone.

Independent of the mark by construction: nothing here reads the mark's key,
its geometry or its payload. See :mod:`claimkit.content.register`.
"""
