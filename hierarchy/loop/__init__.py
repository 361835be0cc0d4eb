"""The closed loop: the design variables (gains), where every state and noise
sits (the layout), the assembled loop, its exact stationary scores and
Monte-Carlo runs of it.
"""

__all__ = []
