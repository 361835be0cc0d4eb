"""Reports of designs and studies: result JSON and text tables, drawings of
designed circuits, pictures of studies and the HTML page of a design.
Pictures import matplotlib inside the functions that draw.
"""

__all__ = []
