"""The learning loop: ``Worker`` (in-process) and ``python -m worker`` (a process)."""

from worker.learner import Worker

__all__ = ["Worker"]
