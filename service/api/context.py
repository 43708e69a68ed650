"""What every route needs, built once per process and reached through FastAPI dependencies."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Annotated

from fastapi import Depends, Request

from service.api.refusals import RefusalLimiter
from service.clock import Clock
from service.config import Settings
from service.db.engine import Database
from service.dispatch import Dispatcher
from service.evaluation import Evaluator
from service.ingest import Ingestor
from service.ops.heartbeats import Heartbeats
from service.policy import Policy

__all__ = ["AppContext", "ContextDep"]


@dataclass
class AppContext:
    settings: Settings
    db: Database
    clock: Clock
    ingestor: Ingestor
    policy: Policy
    evaluator: Evaluator
    dispatcher: Dispatcher
    refusals: RefusalLimiter  # one per process, shared by every app built on this context
    heartbeats: Heartbeats = field(default_factory=Heartbeats)  # the scheduler's jobs, for /healthz


def _context(request: Request) -> AppContext:
    ctx: AppContext = request.app.state.ctx
    return ctx


ContextDep = Annotated[AppContext, Depends(_context)]
