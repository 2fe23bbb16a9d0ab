"""Decorators that keep one bad callback from ending the controller node.

An unexpected exception is logged (throttled) and halts a moving run with reason
``internal_error`` (``ControllerNode._internal_error``); a service answers that it failed and
why. The output tick has its own last-resort guard (``output_cycle``).
"""
from __future__ import annotations

import functools


def guarded(method):
    """Log an unexpected exception of a callback instead of letting it end the node; halt a
    moving run (reason ``internal_error``)."""
    @functools.wraps(method)
    def wrapper(self, *args):
        try:
            return method(self, *args)
        except Exception as exc:  # noqa: BLE001 - the node must not die on one bad callback
            self._internal_error(method.__name__, exc)
            return None
    return wrapper


def guarded_service(method):
    """As ``guarded`` for a service: the response says the call failed and why."""
    @functools.wraps(method)
    def wrapper(self, request, response):
        try:
            return method(self, request, response)
        except Exception as exc:  # noqa: BLE001
            self._internal_error(method.__name__, exc)
            response.success, response.message = False, f"internal error: {exc}"
            return response
    return wrapper
