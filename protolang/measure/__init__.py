"""Result collectors: recordings (plain arrays) -> tables; ``collect`` is loaded on first use."""

__all__ = ["collect"]


def __getattr__(name):
    if name == "collect":
        from .collect import collect

        return collect
    raise AttributeError(name)
