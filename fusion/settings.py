"""The live fusion settings: one stored row, seeded from configuration, changed by PUT /api/v1/fusion."""

from __future__ import annotations

from typing import Any, Mapping

from pydantic import ValidationError
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .api.schemas import FusionSettingsIn
from .detection.energy import check_snr_wall
from .errors import ConfigError, Unprocessable
from .models import FusionSettings, utcnow
from .plan import error_path

__all__ = ["get_settings", "update_settings", "settings_dict", "check_settings", "settings_warnings"]

_FIELDS = ("rule", "k", "target_pf", "min_nodes", "window_s", "max_age_s", "interval_s", "confidence", "prior",
           "snr_db")


def settings_dict(row: FusionSettings) -> dict[str, Any]:
    return {f: getattr(row, f) for f in _FIELDS}


def check_settings(values: Mapping[str, Any]) -> list[dict]:
    """Cross-field checks that a single field's schema cannot express; returns ``{path, message}`` items."""
    errors = []
    if values["rule"] == "k_of_n" and values.get("k") is None:
        errors.append({"path": "k", "message": "rule k_of_n needs k (the number of votes that decide occupied)"})
    if values["window_s"] > values["max_age_s"]:
        errors.append({"path": "window_s", "message": f"window_s ({values['window_s']:g}) cannot exceed "
                       f"max_age_s ({values['max_age_s']:g}): older reports are no evidence"})
    return errors


def settings_warnings(values: Mapping[str, Any], config: Mapping[str, Any]) -> list[str]:
    """Advice about settings that are valid but cannot do what they promise (shown by the API and CLI)."""
    wall = check_snr_wall(values["snr_db"], config.get("NOISE_UNCERTAINTY_DB", 0.0))
    return [f"snr_db: {wall.message}"] if wall.below_wall else []


def get_settings(session: Session, config: Mapping[str, Any]) -> FusionSettings:
    """The stored settings; on a new database, create them from the configuration's fusion keys."""
    row = session.get(FusionSettings, 1)
    if row is not None:
        return row
    seed = {f: config[f.upper()] for f in _FIELDS}
    try:
        FusionSettingsIn.model_validate(seed, strict=False)
    except ValidationError as exc:
        e = exc.errors(include_url=False)[0]
        raise ConfigError(f"OCCFUSE_{error_path(e['loc']).upper()}: {e['msg']}") from None
    problems = check_settings(seed)
    if problems:
        raise ConfigError(f"OCCFUSE_{problems[0]['path'].upper()}: {problems[0]['message']}")
    row = FusionSettings(id=1, **seed)
    try:
        with session.begin_nested():  # several workers may seed a new database at once: one insert wins
            session.add(row)
    except IntegrityError:
        row = session.get(FusionSettings, 1, populate_existing=True)
    return row


def update_settings(session: Session, config: Mapping[str, Any], change: FusionSettingsIn) -> FusionSettings:
    """Apply the fields present in `change`; the next epoch uses them (interval_s included)."""
    row = get_settings(session, config)
    values = settings_dict(row)
    sent = change.model_dump(exclude_unset=True)
    errors = [{"path": f, "message": "must not be null (leave the field out to keep its value)"}
              for f, v in sent.items() if v is None and f != "k"]  # only k may be cleared
    if errors:
        raise Unprocessable("; ".join(f"{e['path']}: {e['message']}" for e in errors), errors=errors)
    values.update(sent)
    errors = check_settings(values)
    if errors:
        raise Unprocessable("; ".join(f"{e['path']}: {e['message']}" for e in errors), errors=errors)
    for f in _FIELDS:
        setattr(row, f, values[f])
    row.updated_at = utcnow()
    return row
