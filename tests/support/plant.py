"""A small seeded plant for tests: one site, one area, two assets with points, one route.

The names are invented for tests only.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from server.storage.tables import Area, Asset, Point, Route, RouteStop, Site


@dataclass
class Plant:
    site_id: int
    area_id: int
    asset_ids: dict[str, int] = field(default_factory=dict)
    point_ids: dict[str, int] = field(default_factory=dict)
    route_id: int = 0
    other_site_id: int = 0
    other_point_id: int = 0

    @property
    def point_id(self) -> int:
        """The first point (drive end of the pump)."""
        return self.point_ids["P1-DE-H"]


def make_plant(db, *, prefix: str = "") -> Plant:
    """Create the plant in one transaction and return the ids."""
    with db.unit_of_work() as s:
        site = Site(name=f"{prefix}Riverside works")
        other = Site(name=f"{prefix}Hilltop annex")
        s.add_all([site, other])
        s.flush()
        area = Area(site_id=site.id, name="Cooling water")
        other_area = Area(site_id=other.id, name="Boiler house")
        s.add_all([area, other_area])
        s.flush()
        pump = Asset(area_id=area.id, name="CW pump 1", kind="pump", rated_power_kw=110, machine_group=2,
                     foundation="rigid", nominal_speed_hz=24.75, forcing_kind="shaft", forcing_multiplier=1.0)
        recip = Asset(area_id=area.id, name="Air compressor 2", kind="reciprocating_compressor",
                      rated_power_kw=75, machine_group=2, foundation="flexible", nominal_speed_hz=12.5,
                      forcing_kind="stroke", forcing_multiplier=2.0)
        fan = Asset(area_id=other_area.id, name="ID fan", kind="fan", rated_power_kw=200, machine_group=2,
                    foundation="rigid", nominal_speed_hz=16.5)
        s.add_all([pump, recip, fan])
        s.flush()
        points = {
            "P1-DE-H": Point(asset_id=pump.id, name="P1-DE-H", location="drive end", direction="horizontal",
                             units="m/s2", expected_fs_hz=2560),
            "P1-NDE-V": Point(asset_id=pump.id, name="P1-NDE-V", location="non-drive end",
                              direction="vertical",
                              units="g", expected_fs_hz=2560),
            "C2-CYL-A": Point(asset_id=recip.id, name="C2-CYL-A", location="cylinder head", direction="axial",
                              units="m/s2", expected_fs_hz=5120),
        }
        s.add_all(points.values())
        fan_point = Point(asset_id=fan.id, name="F-DE-H", units="m/s2")
        s.add(fan_point)
        s.flush()
        route = Route(site_id=site.id, name="Weekly CW walk")
        s.add(route)
        s.flush()
        for i, (name, hours) in enumerate((("P1-DE-H", 168.0), ("P1-NDE-V", 168.0), ("C2-CYL-A", 24.0))):
            s.add(RouteStop(route_id=route.id, point_id=points[name].id, position=i, due_interval_h=hours))
        return Plant(site.id, area.id, {"pump": pump.id, "recip": recip.id, "fan": fan.id},
                     {k: p.id for k, p in points.items()}, route.id, other.id, fan_point.id)
