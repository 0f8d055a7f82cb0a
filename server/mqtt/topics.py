"""Topic rules: which topics the bridge subscribes to and how a topic names a measurement point.

A rule is a topic with placeholders that each fill one whole level::

    halfwatch/{site}/{point_id}/records        # point by id; the site (name or id) must match
    plant/{site}/{asset}/{point}/vib           # point by name within the asset and site

``{point_id}`` (the point's numeric id) or ``{point}`` (its name, unique within what the other
placeholders narrow it to) is required; ``{site}`` and ``{asset}`` narrow the search and guard
against a gateway writing to another site's points. ``+`` may stand for a level that is ignored;
``#`` may end the rule. The subscription filter is the rule with every placeholder replaced by ``+``.

Reply topics are templates over ``{topic}`` (the incoming topic) and the rule's placeholders,
for example ``{topic}/reply`` or ``halfwatch/{site}/replies``.
"""

from __future__ import annotations

import re
import string

from sqlalchemy import select

from server.errors import AppError, NotFound
from server.storage.tables import Area, Asset, Point, Site

PLACEHOLDERS = ("site", "asset", "point", "point_id")
_WHOLE = re.compile(r"\{([a-z_]+)\}")


class RuleError(ValueError):
    """A topic rule or reply template that cannot work; the message says why."""


def _topic_matches(sub: str, topic: str) -> bool:
    from paho.mqtt.client import topic_matches_sub

    return topic_matches_sub(sub, topic)


class TopicRule:
    def __init__(self, template: str):
        template = template.strip()
        if not template:
            raise RuleError("the topic rule is empty; e.g. halfwatch/{site}/{point_id}/records")
        self.template = template
        self.levels = template.split("/")
        self.names: list[str | None] = []
        for i, level in enumerate(self.levels):
            m = _WHOLE.fullmatch(level)
            if m:
                name = m.group(1)
                if name not in PLACEHOLDERS:
                    raise RuleError(f"unknown placeholder {{{name}}} in topic rule {template!r}; use "
                                    + ", ".join(f"{{{p}}}" for p in PLACEHOLDERS))
                if name in self.names:
                    raise RuleError(f"placeholder {{{name}}} appears twice in topic rule {template!r}")
                self.names.append(name)
            elif "{" in level or "}" in level:
                raise RuleError(f"placeholder in level {level!r} of {template!r} must fill the whole level")
            elif "#" in level and (level != "#" or i != len(self.levels) - 1):
                raise RuleError(f"'#' may only be the last level of the topic rule {template!r}")
            elif "+" in level and level != "+":
                raise RuleError(f"'+' must fill a whole level in topic rule {template!r}")
            else:
                self.names.append(None)
        if "point_id" not in self.names and "point" not in self.names:
            raise RuleError(f"topic rule {template!r} names no point; add a {{point_id}} or {{point}} level")
        self.filter = "/".join("+" if n else lvl for n, lvl in zip(self.names, self.levels, strict=True))

    def match(self, topic: str) -> dict[str, str] | None:
        """The placeholder values of ``topic``, or None if it does not fit the rule."""
        if not _topic_matches(self.filter, topic):
            return None
        parts = topic.split("/")
        return {n: parts[i] for i, n in enumerate(self.names) if n}

    def check_reply_template(self, template: str) -> None:
        """Refuse a reply template that uses unknown names or that the bridge would receive itself."""
        fields = {f for _, f, _, _ in string.Formatter().parse(template) if f is not None}
        unknown = fields - {"topic", *[n for n in self.names if n]}
        if unknown:
            raise RuleError(f"reply topic {template!r} uses {', '.join(sorted(unknown))}, which the topic "
                            f"rule does not provide; use {{topic}} or the rule's placeholders")
        example = {n: "x1" for n in PLACEHOLDERS}
        sample = "/".join("x1" if n else ("x1" if lvl in "+#" else lvl)
                          for n, lvl in zip(self.names, self.levels, strict=True))
        if _topic_matches(self.filter, template.format(topic=sample, **example)):
            raise RuleError(f"reply topic {template!r} matches the subscription {self.filter!r}; the bridge "
                            "would read its own replies. Use another level, e.g. {topic}/reply")

    def reply_topic(self, template: str, topic: str, fields: dict[str, str] | None) -> str | None:
        values = {n: "_" for n in PLACEHOLDERS} | (fields or {})
        try:
            reply = template.format(topic=topic, **values)
        except (KeyError, IndexError, ValueError):
            return None
        return None if _topic_matches(self.filter, reply) else reply


def resolve_point(session, fields: dict[str, str]) -> tuple[int, int | None]:
    """(point id, site id or None) for the placeholder values of one topic; AppError otherwise."""
    site_id = None
    if "site" in fields:
        site = fields["site"]
        q = select(Site.id).where(Site.id == int(site)) if site.isdigit() else select(Site.id).where(
            Site.name == site)
        site_id = session.scalar(q)
        if site_id is None:
            raise NotFound(f"topic names site {site!r}, which does not exist; use a site name or id from "
                           "GET /api/v1/tree", field="topic")
    q = select(Point.id).join(Asset, Asset.id == Point.asset_id).join(Area, Area.id == Asset.area_id)
    if site_id is not None:
        q = q.where(Area.site_id == site_id)
    if "asset" in fields:
        q = q.where(Asset.name == fields["asset"])
    if "point_id" in fields:
        raw = fields["point_id"]
        if not raw.isdigit():
            raise AppError(f"topic level {{point_id}} is {raw!r}, not a point id (a whole number)",
                           field="topic", status=422, code="invalid")
        q = q.where(Point.id == int(raw))
        label = f"point {raw}"
    else:
        q = q.where(Point.name == fields["point"])
        label = f"point {fields['point']!r}"
    ids = list(session.scalars(q.limit(2)))
    where = "".join(f" in {k} {fields[k]!r}" for k in ("asset", "site") if k in fields)
    if not ids:
        raise NotFound(f"topic names {label}, which does not exist{where}; check the gateway's topic",
                       field="topic")
    if len(ids) > 1:
        raise AppError(f"topic names {label}, which is not unique{where}; add {{asset}} or {{site}} to "
                       "the topic rule, or use {point_id}", field="topic", status=409, code="conflict")
    return ids[0], site_id
