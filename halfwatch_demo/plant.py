"""The invented demo plant, "Sallowmere Works": four areas, thirteen machines, two weekly routes.

The works, its machines and their stories are our own invention for the demo. Each asset names a
``behaviour`` that :mod:`halfwatch_demo.scenario` turns into simulator settings over time:

``healthy``     1X and harmonics at steady levels
``onset``       vertical pump VP-102: a speed-setpoint rise puts 0.5X onto a motor-stand mode; the
                half-order grows over the following weeks (alert, then danger)
``whirl``       boiler feed pump BFP-2: oil whirl in a sleeve bearing after a bearing change
``looseness``   vertical pump VP-103: a loose motor-stand bolt, steady half-order with 1.5X and 2.5X
``variable``    cooling-tower fan CT-3 on a drive whose speed follows the day's temperature

Four online points (VP-102, ID-1, BFP-2, CT-3) take a reading every hour; the other points are read
on the weekly walks.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select

SITE_NAME = "Sallowmere Works"
SITE_DESCRIPTION = ("Invented demo plant. Every reading here is simulated by the halfwatch simulator; "
                    "none is a measurement.")

# Record length and sample rate per machine. Every record, online or on a walk, is long enough for the
# analysis' full resolution (1X/200 with 8 averages, i.e. about 900 cycles of the forcing, far above the
# T >= 250/f_1X needed to tell whirl at 0.48X from 0.5X): 920 cycles at 90 % of the nominal speed. The
# sample rate is the lowest multiple of 64 Hz that is 2.56 x F_max (common practice) with F_max = 7X at
# the machine's top speed (the simulated bearing tone's upper sideband is at 6.42X) -- low rates with long
# records keep each record between 16,384 and 32,768 samples.
RECORD_CYCLES = 920
FMAX_ORDER = 7.0


def machine_fs_hz(top_forcing_hz: float) -> float:
    """Sample rate (Hz) for a machine whose forcing frequency reaches ``top_forcing_hz``."""
    return 64.0 * -(-2.56 * FMAX_ORDER * top_forcing_hz // 64.0)


@dataclass(frozen=True)
class PointSpec:
    name: str
    location: str
    direction: str
    online: bool


@dataclass(frozen=True)
class AssetSpec:
    area: str
    name: str
    kind: str
    behaviour: str
    nominal_hz: float  # shaft speed, rev/s
    power_kw: float
    foundation: str = "rigid"
    group: int = 2
    forcing_kind: str = "shaft"
    multiplier: float = 1.0
    one_x_mm_s: float = 1.2  # 1X velocity r.m.s. in good condition
    top_speed_factor: float = 1.0  # highest shaft speed / nominal (VP-102's setpoint rise, CT-3's drive)
    description: str = ""
    points: tuple[PointSpec, ...] = ()

    @property
    def fs_hz(self) -> float:
        return machine_fs_hz(self.nominal_hz * self.multiplier * self.top_speed_factor * 1.003)


def _pts(tag: str, *items: tuple[str, str, bool]) -> tuple[PointSpec, ...]:
    return tuple(PointSpec(f"{tag} {loc} {d[0].upper()}", loc, d, online) for loc, d, online in items)


AREAS = {
    "Raw water intake": "River intake: three vertical pumps on motor stands and the screen wash.",
    "Boiler house": "Steam raising: draught fans and the feed pumps.",
    "Compressor house": "Process air: a reciprocating compressor, a centrifugal unit and a gearbox.",
    "Cooling and process water": "Cooling tower, chilled water and process water pumps.",
}

ASSETS: tuple[AssetSpec, ...] = (
    AssetSpec("Raw water intake", "Intake pump VP-101", "pump", "healthy", 24.75, 160, "flexible",
              one_x_mm_s=1.3, description="Vertical turbine pump on a tall motor stand.",
              points=_pts("VP-101", ("motor top", "horizontal", False), ("motor top", "vertical", False))),
    AssetSpec("Raw water intake", "Intake pump VP-102", "pump", "onset", 24.0, 160, "flexible",
              one_x_mm_s=1.3, top_speed_factor=25.4 / 24.0,
              description="Vertical turbine pump on a variable-speed drive.",
              points=_pts("VP-102", ("motor top", "horizontal", True), ("motor top", "vertical", False))),
    AssetSpec("Raw water intake", "Intake pump VP-103", "pump", "looseness", 24.75, 160, "flexible",
              one_x_mm_s=3.4, description="Vertical turbine pump on a tall motor stand.",
              points=_pts("VP-103", ("motor top", "horizontal", False), ("motor base", "horizontal", False))),
    AssetSpec("Raw water intake", "Screen wash pump SW-1", "pump", "healthy", 49.3, 22, one_x_mm_s=1.0,
              points=_pts("SW-1", ("pump drive end", "horizontal", False),
                          ("motor drive end", "vertical", False))),
    AssetSpec("Boiler house", "ID fan ID-1", "fan", "healthy", 16.5, 250, "flexible", one_x_mm_s=2.0,
              description="Induced-draught fan on a fabricated (flexible) steel frame.",
              points=_pts("ID-1", ("fan drive end", "horizontal", True), ("fan non-drive end", "vertical",
                                                                          False))),
    AssetSpec("Boiler house", "FD fan FD-1", "fan", "healthy", 24.7, 110, one_x_mm_s=1.1,
              points=_pts("FD-1", ("fan drive end", "horizontal", False), ("motor drive end", "horizontal",
                                                                           False))),
    AssetSpec("Boiler house", "Boiler feed pump BFP-2", "pump", "whirl", 49.5, 280, one_x_mm_s=1.8,
              description="Multistage feed pump in sleeve (fluid-film) bearings.",
              points=_pts("BFP-2", ("pump drive end", "horizontal", True), ("pump non-drive end", "vertical",
                                                                            False))),
    AssetSpec("Compressor house", "Reciprocating compressor RC-1", "reciprocating_compressor", "healthy",
              12.5, 90, "flexible", forcing_kind="stroke", multiplier=2.0, one_x_mm_s=2.2,
              description="Double-acting, two-cylinder air compressor (forcing = 2 x crank speed).",
              points=_pts("RC-1", ("crankcase", "horizontal", False), ("cylinder 1 head", "axial", False))),
    AssetSpec("Compressor house", "Centrifugal compressor AC-2", "compressor", "healthy", 49.6, 250,
              one_x_mm_s=0.9, points=_pts("AC-2", ("motor drive end", "horizontal", False))),
    AssetSpec("Compressor house", "Compressor gearbox GB-2", "gearbox", "healthy", 24.8, 250,
              one_x_mm_s=1.0, description="Speed-increasing gearbox between motor and AC-2 (input shaft).",
              points=_pts("GB-2", ("input bearing", "horizontal", False),
                          ("output bearing", "axial", False))),
    AssetSpec("Cooling and process water", "Cooling tower fan CT-3", "fan", "variable", 19.0, 75, "flexible",
              one_x_mm_s=1.4, top_speed_factor=1.045 * 1.003,
              description="Variable-speed fan: the drive follows the cooling-water temperature over the day.",
              points=_pts("CT-3", ("gearbox output", "horizontal", True))),
    AssetSpec("Cooling and process water", "Chilled water pump CHW-1", "pump", "healthy", 24.6, 45,
              one_x_mm_s=0.9, points=_pts("CHW-1", ("pump drive end", "horizontal", False),
                                          ("motor non-drive end", "vertical", False))),
    AssetSpec("Cooling and process water", "Process water pump PW-4", "pump", "healthy", 29.5, 55,
              one_x_mm_s=1.0, points=_pts("PW-4", ("pump drive end", "horizontal", False),
                                          ("motor drive end", "horizontal", False))),
)

# Two weekly walks. The intake walk missed one week (an outage); on the compressor walk the last two
# visits could not reach CHW-1 and PW-4 (area closed for work), so those stops are overdue.
ROUTES = {
    "Intake and boiler house weekly": ("VP-101", "VP-102", "VP-103", "SW-1", "ID-1", "FD-1", "BFP-2"),
    "Compressor and cooling weekly": ("RC-1", "AC-2", "GB-2", "CHW-1", "PW-4"),
}
ROUTE_INTERVAL_H = 168.0


def record_samples(asset: AssetSpec) -> int:
    """Samples per record: RECORD_CYCLES of the forcing at 90 % of nominal, rounded up to 4,096."""
    seconds = RECORD_CYCLES / (0.9 * asset.nominal_hz * asset.multiplier)
    return int(-(-seconds * asset.fs_hz // 4096) * 4096)


def tag(asset: AssetSpec) -> str:
    return asset.name.rsplit(" ", 1)[-1]


def ensure_plant(db) -> dict[str, int]:
    """Create the plant, its points' default alarm rules and the routes once; returns point ids by name."""
    from server.alarms import ensure_default_rules
    from server.storage.tables import Area, Asset, Point, Route, RouteStop, Site

    with db.unit_of_work() as s:
        site = s.scalar(select(Site).where(Site.name == SITE_NAME))
        if site is None:
            site = Site(name=SITE_NAME, description=SITE_DESCRIPTION)
            s.add(site)
            s.flush()
            areas = {}
            for name, text in AREAS.items():
                areas[name] = Area(site_id=site.id, name=name, description=text)
                s.add(areas[name])
            s.flush()
            by_tag = {}
            for spec in ASSETS:
                asset = Asset(area_id=areas[spec.area].id, name=spec.name, kind=spec.kind,
                              rated_power_kw=spec.power_kw, machine_group=spec.group,
                              foundation=spec.foundation, nominal_speed_hz=spec.nominal_hz,
                              forcing_kind=spec.forcing_kind, forcing_multiplier=spec.multiplier,
                              description=(spec.description + " Simulated.").strip())
                s.add(asset)
                s.flush()
                by_tag[tag(spec)] = []
                for p in spec.points:
                    point = Point(asset_id=asset.id, name=p.name, location=p.location, direction=p.direction,
                                  units="g", expected_fs_hz=spec.fs_hz)
                    s.add(point)
                    s.flush()
                    ensure_default_rules(s, point)
                    if not p.online:
                        by_tag[tag(spec)].append(point.id)
            for name, tags in ROUTES.items():
                route = Route(site_id=site.id, name=name,
                              description="Weekly walk with a portable collector.")
                s.add(route)
                s.flush()
                stops = [pid for t in tags for pid in by_tag[t]]
                for i, pid in enumerate(stops):
                    s.add(RouteStop(route_id=route.id, point_id=pid, position=i,
                                    due_interval_h=ROUTE_INTERVAL_H))
        rows = s.execute(select(Point.name, Point.id).join(Asset, Asset.id == Point.asset_id)
                         .join(Area, Area.id == Asset.area_id).where(Area.site_id == site.id)).all()
        return {name: pid for name, pid in rows}


def site_ids(db) -> dict[str, int]:
    """Ids of the demo site and its areas (``{"site": id, <area name>: id}``)."""
    from server.storage.tables import Area, Site

    with db.read() as s:
        site = s.scalar(select(Site).where(Site.name == SITE_NAME))
        out = {"site": site.id}
        out.update({a.name: a.id for a in s.scalars(select(Area).where(Area.site_id == site.id))})
        return out


def all_points() -> list[tuple[AssetSpec, PointSpec]]:
    return [(a, p) for a in ASSETS for p in a.points]
