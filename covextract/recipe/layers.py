"""The recipe's ``layers:`` block: one raster band, band math or series, and how to read it."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BeforeValidator, Field, StringConstraints, field_validator, model_validator

from covextract.recipe.common import (
    Finite,
    Name,
    PathText,
    RecipeModel,
    check_crs,
    issue,
    nodata_list,
    problem,
    raise_issues,
)

__all__ = ["Band", "Layer"]


class Band(RecipeModel):
    """One input band of a band-math layer.

    Parameters
    ----------
    file : str
        Raster path.
    band : int
        1-based band number; default 1.
    scale, offset : float, optional
        Physical value = stored × scale + offset, applied before the index.
    nodata : list of float, optional
        Stored fill values, in addition to the file's own nodata.
    """

    file: PathText
    band: Annotated[int, Field(ge=1)] = 1
    scale: Finite | None = None
    offset: Finite | None = None
    nodata: Annotated[
        Annotated[list[Finite], Field(min_length=1)] | None,
        BeforeValidator(nodata_list),
    ] = None


class Layer(RecipeModel):
    """One raster band and how to read it.

    Parameters
    ----------
    file : str
        Raster path.
    band : int
        1-based band number; default 1.
    kind : {"continuous", "categorical"}
        Measured values or class codes; default continuous.
    scale, offset : float, optional
        Physical value = stored value × scale + offset (continuous only).
    nodata : list of float, optional
        Stored values to treat as missing, in addition to the file's own
        nodata; a single number is read as a list of one.
    valid_range : [float, float], optional
        Physical values outside ``[min, max]`` are treated as missing
        (continuous only).
    crs : str, optional
        CRS of a raster whose file has none.
    unit, source, version, citation, license : str, optional
        Metadata copied to the codebook and the manifest.
    classes : dict of int to str
        Class code to label (categorical layers; required there).
    groups : dict of str to list of int, optional
        Several class codes counted as one (categorical layers).
    bands : dict of str to Band, optional
        Instead of ``file``: named bands of rasters on one grid, combined per
        pixel by ``index`` or ``expression``.
    index : {"ndvi", "evi"}, optional
        A built-in index of ``bands`` (NDVI: bands nir, red; EVI: nir, red, blue).
    expression : str, optional
        A band-math formula over the band names, e.g. ``(nir - red) / (nir + red)``.
    ceiling : float, optional
        Physical values above it are set to it (saturated night lights).
    every : str, optional
        Makes the layer a series: ``file`` is a path template with date fields
        (``rain_{year}{month:02d}.tif``) and each file covers one step of
        ``month``, ``day``, ``year`` or ``N days``; for a NetCDF cube, the
        step when the file has no time bounds.
    variable : str, optional
        The variable of a NetCDF cube (``file: rain.nc``); makes the layer a
        series with the time axis of the file.
    """

    file: PathText | None = None
    band: Annotated[int, Field(ge=1)] = 1
    kind: Literal["continuous", "categorical"] = "continuous"
    scale: Finite | None = None
    offset: Finite | None = None
    nodata: Annotated[
        Annotated[list[Finite], Field(min_length=1)] | None,
        BeforeValidator(nodata_list),
    ] = None
    valid_range: Annotated[list[Finite], Field(min_length=2, max_length=2)] | None = None
    crs: str | None = None
    unit: str | None = None
    source: str | None = None
    version: str | None = None
    citation: str | None = None
    license: str | None = None
    classes: Annotated[dict[int, Name], Field(min_length=1)] | None = None
    groups: (
        Annotated[dict[Name, Annotated[list[int], Field(min_length=1)]], Field(min_length=1)] | None
    ) = None
    bands: Annotated[dict[Name, Band], Field(min_length=1)] | None = None
    index: Literal["ndvi", "evi"] | None = None
    expression: Annotated[str, StringConstraints(min_length=1)] | None = None
    ceiling: Finite | None = None
    every: Annotated[str, StringConstraints(min_length=1)] | None = None
    variable: Annotated[str, StringConstraints(min_length=1)] | None = None

    @field_validator("every")
    @classmethod
    def _valid_every(cls, value: str | None) -> str | None:
        if value is not None:
            from covextract.core.periods import parse_every
            from covextract.errors import RecipeError

            try:
                parse_every(value)
            except RecipeError as exc:
                raise problem(exc.problems[0].message) from None
        return value

    @property
    def is_series(self) -> bool:
        """True for a series of rasters (template or cube)."""
        return self.variable is not None or (self.file is not None and "{" in self.file)

    @field_validator("crs")
    @classmethod
    def _valid_crs(cls, value: str | None) -> str | None:
        return check_crs(value)

    @field_validator("scale")
    @classmethod
    def _scale_not_zero(cls, value: float | None) -> float | None:
        if value == 0:
            raise problem("scale 0 would turn every pixel into the offset; remove scale or fix it")
        return value

    @field_validator("valid_range")
    @classmethod
    def _range_order(cls, value: list[float] | None) -> list[float] | None:
        if value is not None and not value[0] < value[1]:
            raise problem(f"valid_range must be [min, max] with min < max, got {value}")
        return value

    @model_validator(mode="after")
    def _kind_rules(self) -> Layer:
        issues = []
        issues += self._band_rules()
        if self.kind == "categorical":
            if self.classes is None:
                issues.append(
                    issue(
                        ("classes",),
                        "a categorical layer needs classes: {<code>: <label>, ...} naming "
                        "each class code (labels become column names)",
                    )
                )
            for key in ("scale", "offset", "valid_range"):
                if getattr(self, key) is not None:
                    issues.append(
                        issue(
                            (key,),
                            f"{key} applies to continuous values, not to class codes; "
                            "remove it from this categorical layer",
                            getattr(self, key),
                        )
                    )
        else:
            for key in ("classes", "groups"):
                if getattr(self, key) is not None:
                    issues.append(
                        issue(
                            (key,),
                            f"{key} apply to categorical layers; add kind: categorical or "
                            f"remove {key}",
                            getattr(self, key),
                        )
                    )
        if self.kind == "categorical" and self.classes:
            seen: dict[str, int] = {}
            for code, label in self.classes.items():
                if label in seen:
                    issues.append(
                        issue(
                            ("classes", code),
                            f"label {label!r} is used for codes {seen[label]} and {code}; "
                            "to count several codes as one, give each its own label and "
                            "add a group",
                            label,
                        )
                    )
                seen.setdefault(label, code)
            for label, codes in (self.groups or {}).items():
                if label in seen:
                    issues.append(
                        issue(
                            ("groups", label),
                            f"group {label!r} has the name of a class; both would write the "
                            "same column: rename the group",
                            label,
                        )
                    )
                for j, code in enumerate(codes):
                    if code not in self.classes:
                        issues.append(
                            issue(
                                ("groups", label, j),
                                f"class code {code} is not in classes; known codes: "
                                + ", ".join(str(c) for c in self.classes),
                                code,
                            )
                        )
                    elif code in codes[:j]:
                        issues.append(
                            issue(("groups", label, j), f"class code {code} is listed twice", code)
                        )
        raise_issues("Layer", issues)
        return self

    def _band_rules(self) -> list:
        issues = []
        if self.file is None and self.bands is None:
            issues.append(
                issue(
                    ("file",),
                    "a layer needs file: <raster>, or bands: with an "
                    "index: or expression: combining them",
                )
            )
        if self.file is not None and self.bands is not None:
            issues.append(issue(("bands",), "give either file: or bands:, not both", None))
        if self.bands is not None:
            if self.kind == "categorical":
                issues.append(
                    issue(
                        ("bands",),
                        "band math gives continuous values; remove kind: categorical",
                        None,
                    )
                )
            if (self.index is None) == (self.expression is None):
                issues.append(
                    issue(
                        ("index",),
                        "bands: need exactly one of index: (ndvi, evi) "
                        "or expression: to combine them",
                        None,
                    )
                )
            needed = {"ndvi": ("nir", "red"), "evi": ("nir", "red", "blue")}.get(self.index, ())
            missing = [b for b in needed if b not in self.bands]
            if missing:
                issues.append(
                    issue(
                        ("bands",),
                        f"index {self.index} needs bands named "
                        f"{', '.join(needed)}; missing: {', '.join(missing)}",
                        None,
                    )
                )
            if self.expression is not None:
                from covextract.errors import RecipeError
                from covextract.sources.expression import parse_expression

                try:
                    parse_expression(self.expression, self.bands)
                except RecipeError as exc:
                    issues.append(issue(("expression",), exc.problems[0].message, self.expression))
        elif self.index is not None or self.expression is not None:
            key = "index" if self.index is not None else "expression"
            issues.append(
                issue(
                    (key,),
                    f"{key}: combines bands: add bands: {{name: {{file: ...}}}}}}}} to this layer",
                    getattr(self, key),
                )
            )
        if self.file is not None and "{" in self.file and self.every is None:
            issues.append(
                issue(
                    ("every",),
                    "a file template with date fields needs every: "
                    "(month, day, year or N days), the length of each file's period",
                    None,
                )
            )
        if (
            self.every is not None
            and self.variable is None
            and (self.file is None or "{" not in self.file)
        ):
            issues.append(
                issue(
                    ("every",),
                    "every: is for series: give file: a template with "
                    "date fields such as rain_{year}{month:02d}.tif, or a NetCDF "
                    "cube with variable:",
                    self.every,
                )
            )
        if self.is_series and self.bands is not None:
            issues.append(issue(("bands",), "band-math layers cannot be series yet", None))
        if self.ceiling is not None and self.kind == "categorical":
            issues.append(issue(("ceiling",), "ceiling applies to continuous values", self.ceiling))
        return issues
