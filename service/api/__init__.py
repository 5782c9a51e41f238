"""HTTP layer: blueprints, schemas, problem details, authentication."""

from __future__ import annotations

from flask import Flask


def register_blueprints(app: Flask) -> None:
    from service.api import health, jobs, models, toolkit

    app.register_blueprint(health.bp)
    app.register_blueprint(models.bp)
    app.register_blueprint(jobs.bp)
    app.register_blueprint(toolkit.bp)
