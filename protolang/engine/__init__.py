"""The Brian2 back end: Plan -> Brian2 network -> Recordings (the only package importing Brian2).

``run_plan`` is loaded on first use so that importing ``protolang.engine.recordings`` stays light.
"""

__all__ = ["run_plan", "Recordings"]


def __getattr__(name):
    if name == "run_plan":
        from .run import run_plan

        return run_plan
    if name == "Recordings":
        from .recordings import Recordings

        return Recordings
    raise AttributeError(name)
