"""The TOML config: one file maps a utility's GIS onto gridflow's roles.

:func:`load_config` reads and validates it; every error names the config key and what it
expects. The commented example is ``sample_gis/millbrook.toml``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path

from gridflow.config.demand import DEFAULT_SCENARIOS, DemandSection, ScenarioSection
from gridflow.config.fireflow import FireflowSection, ReportSection
from gridflow.config.flowtests import FlowTestsSection, check_flow_test_layers
from gridflow.config.layers import (
    ElevationSection,
    LayersSection,
    RoughnessSection,
    check_layer_roles,
    parse_inputs,
)
from gridflow.config.ranges import check_ranges, check_relations
from gridflow.config.schema import opt, parse_section, section, table_of
from gridflow.config.sections import CriteriaSection, RunSection, SolverSection
from gridflow.config.segments import SegmentsSection
from gridflow.errors import ConfigError

__all__ = ["Config", "load_config", "parse_config"]


@dataclass(frozen=True, kw_only=True)
class Config:
    """A validated config. ``base_dir`` is the config file's folder (relative paths)."""

    run: RunSection = opt(parse=section(RunSection), doc="the run as a whole",
                          default_factory=RunSection)
    inputs: dict = opt(parse=parse_inputs,
                       doc="input files by name: name = 'path' (or a PostgreSQL database, "
                           "see the PostGIS section)")
    layers: LayersSection = opt(parse=section(LayersSection), doc="layer per role")
    elevation: ElevationSection = opt(parse=section(ElevationSection),
                                      default_factory=ElevationSection,
                                      doc="where node elevations come from")
    roughness: RoughnessSection = opt(parse=section(RoughnessSection),
                                      default_factory=RoughnessSection,
                                      doc="pipe roughness by attribute or table")
    criteria: CriteriaSection = opt(parse=section(CriteriaSection), doc="flag thresholds",
                                    default_factory=CriteriaSection)
    solver: SolverSection = opt(parse=section(SolverSection), doc="hydraulic solver options",
                                default_factory=SolverSection)
    demand: DemandSection = opt(parse=section(DemandSection), default_factory=DemandSection,
                                doc="demand allocation")
    scenarios: dict = opt(parse=table_of(section(ScenarioSection)),
                          default_factory=lambda: dict(DEFAULT_SCENARIOS),
                          doc="named demand scenarios (default average_day, max_day, peak_hour)")
    fireflow: FireflowSection = opt(parse=section(FireflowSection),
                                    default_factory=FireflowSection, doc="fire-flow sweep")
    flow_tests: FlowTestsSection = opt(parse=section(FlowTestsSection),
                                       default_factory=FlowTestsSection,
                                       doc="field hydrant flow tests and roughness calibration")
    segments: SegmentsSection = opt(parse=section(SegmentsSection),
                                    default_factory=SegmentsSection,
                                    doc="valve segments and shutdown criticality")
    report: ReportSection = opt(parse=section(ReportSection), default_factory=ReportSection,
                                doc="HTML report")
    raw: dict = field(default_factory=dict, repr=False)
    base_dir: Path = field(default=Path("."))
    path: Path | None = None
    sha256: str = ""

    def resolve(self, p: str | Path) -> Path:
        """A path from the config, relative to the config file's folder."""
        p = Path(p)
        return p if p.is_absolute() else (self.base_dir / p)


_SECTIONS = [f.name for f in fields(Config) if "parse" in f.metadata]


def parse_config(table: dict, *, base_dir: Path = Path("."), path: Path | None = None,
                 sha256: str = "") -> Config:
    """Validate an already-parsed TOML table (cross-checks included)."""
    cfg = parse_section(Config, table, "")
    check_layer_roles(cfg.layers, cfg.inputs)
    check_flow_test_layers(cfg.layers, cfg.inputs, cfg.flow_tests)
    check_ranges(cfg)
    check_relations(cfg)
    import re

    for name in cfg.scenarios:
        if not re.fullmatch(r"[a-z0-9_]+", name):
            raise ConfigError(f"scenario name {name!r} must be lower case letters, digits and _ "
                              "(it becomes a layer name)", key=f"scenarios.{name}")
    if cfg.fireflow.enabled and cfg.fireflow.scenario not in cfg.scenarios:
        raise ConfigError(f"config key fireflow.scenario names {cfg.fireflow.scenario!r}, which "
                          f"is not a scenario ({', '.join(cfg.scenarios)})",
                          key="fireflow.scenario")
    seg = cfg.segments
    if seg.scenario not in cfg.scenarios:
        explicit = isinstance(table.get("segments"), dict) and "scenario" in table["segments"]
        if explicit and seg.enabled and seg.criticality:
            raise ConfigError(f"config key segments.scenario names {seg.scenario!r}, which is "
                              f"not a scenario ({', '.join(cfg.scenarios)})",
                              key="segments.scenario")
        if cfg.scenarios:  # the default names a scenario this config does not have
            seg = dataclasses.replace(seg, scenario=next(iter(cfg.scenarios)))
            cfg = dataclasses.replace(cfg, segments=seg)
    if seg.batch_size < 1 or seg.max_meters < 0:
        key = "segments.batch_size" if seg.batch_size < 1 else "segments.max_meters"
        raise ConfigError(f"config key {key} must be a whole number of at least "
                          f"{1 if key.endswith('batch_size') else 0}", key=key)
    return Config(**{k: getattr(cfg, k) for k in _SECTIONS}, raw=table, base_dir=base_dir,
                  path=path, sha256=sha256)


def load_config(path: str | Path) -> Config:
    """Read and validate a config file.

    Raises
    ------
    ConfigError
        If the file is missing or not valid TOML, or a key is unknown, mistyped or missing.
    """
    path = Path(path)
    from gridflow.io.paths import require_regular_file

    require_regular_file(path, "config", error=ConfigError)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"cannot read config {path}: {exc.strerror}", file=str(path)) from None
    try:
        table = tomllib.loads(data.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config {path} is not valid TOML: {exc}", file=str(path)) from None
    try:
        return parse_config(table, base_dir=path.resolve().parent, path=path,
                            sha256=hashlib.sha256(data).hexdigest())
    except ConfigError as exc:
        fields_ = {k: v for k, v in exc.fields.items() if k != "file"}
        raise ConfigError(f"{path}: {exc.message}", file=str(path), **fields_) from None
