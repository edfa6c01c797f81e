"""Station metadata with epochs: coordinates of a station at a time.

A station may move or change; each row of the metadata is one **epoch** of one station
(``NET.STA.LOC``, FDSN source identifier) with its coordinates and the half-open time interval
[start, end) in which they hold. An empty start or end is open. Look-ups are by station and time
and vectorized over rows (:meth:`StationMetadata.lookup`).

Sources
-------
:meth:`StationMetadata.read` takes either kind and tells them apart by the first byte.

- **Station CSV** (:meth:`StationMetadata.read_csv`), one epoch per line:

  =========== ======= ==================================================================
  column      unit    content
  =========== ======= ==================================================================
  network     --      FDSN network code, 1-8 characters A-Z 0-9
  station     --      station code, 1-8 characters
  location    --      location code, 0-2 characters; empty or ``--`` for none
  latitude    deg     WGS84, [-90, 90]
  longitude   deg     WGS84, [-180, 360) (stored in [-180, 180))
  elevation   m       above sea level (as StationXML); empty if unknown
  start       UTC     ISO 8601; empty: since ever
  end         UTC     ISO 8601, exclusive; empty: still valid
  =========== ======= ==================================================================

  Times without an offset are UTC; ``Z`` or an offset is converted.
- **StationXML** (:meth:`StationMetadata.read_stationxml`, through ``obspy.read_inventory``;
  FDSN StationXML 1.x): one epoch per channel epoch (location codes live on channels), with the
  channel's coordinates; identical epochs of several channels collapse into one. A station
  without channels gives one epoch with location ``""`` from the station's own coordinates.

Matching rules
--------------
1. The exact ``NET.STA.LOC`` is looked up. If it has an epoch containing the time, that epoch
   is used; if it has epochs but none contains the time, that is an error naming the station,
   the time and the epochs.
2. Only if the exact identifier has no epoch at all (e.g. a bulletin without location codes
   against a StationXML with ``00``), the epochs of ``NET.STA`` at any location are used.
3. Several epochs valid at once are fine when their coordinates agree within 0.001 deg
   (about 110 m) and 100 m in elevation, a distance error far below what moves a magnitude
   (chosen here, common practice, no source); the one with the smallest location code and
   earliest start is used. Otherwise the look-up is ambiguous, an error naming the epochs'
   sources.

Problems come back per row in :attr:`StationLookup.problem` (batch use), or raise
:class:`~stations.errors.StationNotFoundError` (:meth:`StationMetadata.coordinates`,
:meth:`StationMetadata.locate`).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from stations.errors import MalformedFileError, StationNotFoundError
from stations.schema import normalise_station_id

if TYPE_CHECKING:
    from obspy import Inventory

__all__ = [
    "CSV_COLUMNS",
    "EPOCH_COLUMNS",
    "StationEpoch",
    "StationLookup",
    "StationMetadata",
]

#: Columns of the station CSV, in order.
CSV_COLUMNS: Final = (
    "network",
    "station",
    "location",
    "latitude",
    "longitude",
    "elevation",
    "start",
    "end",
)
#: Columns of :attr:`StationMetadata.epochs`.
EPOCH_COLUMNS: Final = (
    "station_id",
    "latitude",
    "longitude",
    "elevation_m",
    "start",
    "end",
    "source",
    "source_location",
)
_COORD_TOLERANCE_DEG: Final = 1e-3
_ELEVATION_TOLERANCE_M: Final = 100.0
_UTC: Final = "datetime64[us, UTC]"


@dataclass(frozen=True, slots=True)
class StationEpoch:
    """One epoch of one station.

    Attributes
    ----------
    station_id : str
        ``NET.STA.LOC``.
    latitude, longitude : float
        WGS84, degrees; longitude in [-180, 180).
    elevation_m : float
        Metres above sea level; NaN if unknown.
    start, end : pandas.Timestamp or None
        UTC; the epoch is [start, end); None is open.
    source, source_location : str
        File (or inventory) and position the epoch was read from.
    """

    station_id: str
    latitude: float
    longitude: float
    elevation_m: float
    start: pd.Timestamp | None
    end: pd.Timestamp | None
    source: str
    source_location: str


@dataclass(frozen=True, slots=True, eq=False)
class StationLookup:
    """Station coordinates for many (station, time) pairs; NaN where not found.

    Attributes
    ----------
    latitude, longitude : ndarray of float64, shape (n,)
        Degrees.
    elevation_m : ndarray of float64, shape (n,)
        Metres above sea level (NaN also where the metadata has no elevation).
    epoch : ndarray of int64, shape (n,)
        Row of :attr:`StationMetadata.epochs` used; -1 where not found.
    problem : ndarray of object (str), shape (n,)
        Empty where found; else the one-line reason (unknown station, no epoch at that time,
        ambiguous epochs), naming station, time and fix.
    """

    latitude: NDArray[np.float64]
    longitude: NDArray[np.float64]
    elevation_m: NDArray[np.float64]
    epoch: NDArray[np.int64]
    problem: NDArray[np.object_]

    @property
    def found(self) -> NDArray[np.bool_]:
        """True where the station had one usable epoch at the time."""
        return np.asarray(self.epoch >= 0)


def _to_utc(values: Any) -> pd.Series:
    """Times as a ``datetime64[us, UTC]`` Series (default index); naive values are UTC."""
    series = pd.Series(np.asarray(values, dtype=object) if isinstance(values, list) else values)
    parsed = pd.to_datetime(series.reset_index(drop=True), utc=True, format="ISO8601")
    return parsed.astype(_UTC)


def _iso(times: pd.Series) -> pd.Series:
    return times.dt.strftime("%Y-%m-%dT%H:%M:%SZ").fillna("open")


class StationMetadata:
    """Station epochs with vectorized look-up by station and time.

    Build it with :meth:`read_csv`, :meth:`read_stationxml`, :meth:`from_inventory` or
    :meth:`from_frame`; combine several with :meth:`concat`.

    Examples
    --------
    >>> meta = StationMetadata.from_frame(pd.DataFrame({
    ...     "network": ["XX"], "station": ["ABC"], "location": [""],
    ...     "latitude": [44.5], "longitude": [-110.4], "elevation": [2400.0],
    ...     "start": ["2001-01-01"], "end": [""]}))
    >>> meta.locate("XX.ABC.", "2020-05-01T00:00:00Z").latitude
    44.5
    """

    __slots__ = ("_epochs",)

    def __init__(self, epochs: pd.DataFrame) -> None:
        """Wrap a frame with :data:`EPOCH_COLUMNS`; use the ``read_*``/``from_*`` constructors."""
        missing = [c for c in EPOCH_COLUMNS if c not in epochs.columns]
        if missing:
            raise ValueError(f"station epochs lack the columns {missing}")
        frame = epochs.loc[:, list(EPOCH_COLUMNS)].copy()
        frame["start"] = _to_utc(frame["start"]).array
        frame["end"] = _to_utc(frame["end"]).array
        frame = frame.sort_values(["station_id", "start"], na_position="first", kind="stable")
        self._epochs = frame.reset_index(drop=True)

    # -- construction --------------------------------------------------------------------
    @classmethod
    def from_frame(cls, frame: pd.DataFrame, *, source: str = "<frame>") -> StationMetadata:
        """Epochs from a frame in the station-CSV columns (:data:`CSV_COLUMNS`).

        Values may be strings (as read from a CSV) or typed. Row ``i`` is reported as
        ``"row i"`` unless the frame has a ``source_location`` column.

        Raises
        ------
        MalformedFileError
            If a column is missing or a value is invalid; names ``source``, the row and fix.
        """
        missing = [c for c in CSV_COLUMNS if c not in frame.columns]
        if missing:
            raise MalformedFileError(
                f"{source}: column {missing[0]!r} is missing; the station table needs "
                f"{', '.join(CSV_COLUMNS)}"
            )
        n = len(frame)
        where = (
            frame["source_location"].astype(str).to_numpy()
            if "source_location" in frame.columns
            else np.array([f"row {i}" for i in range(n)], dtype=object)
        )
        text = {c: frame[c].astype(object).where(frame[c].notna(), "").astype(str).str.strip()
                for c in CSV_COLUMNS}  # fmt: skip
        ids = _station_ids(text["network"], text["station"], text["location"], where, source)
        lat = _numbers(text["latitude"], "latitude", where, source, required=True)
        lon = _numbers(text["longitude"], "longitude", where, source, required=True)
        elev = _numbers(text["elevation"], "elevation", where, source, required=False)
        _check_range(lat, -90.0, 90.0, "latitude", where, source)
        _check_range(lon, -180.0, 360.0, "longitude", where, source)
        start = _times(text["start"], "start", where, source)
        end = _times(text["end"], "end", where, source)
        bad = (start.notna() & end.notna() & (end <= start)).to_numpy()
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise MalformedFileError(
                f"{source}: {where[i]}: epoch end {text['end'].iloc[i]} is not after start "
                f"{text['start'].iloc[i]}; fix the dates"
            )
        epochs = pd.DataFrame(
            {
                "station_id": ids,
                "latitude": lat,
                "longitude": (lon + 180.0) % 360.0 - 180.0,
                "elevation_m": elev,
                "start": start.array,
                "end": end.array,
                "source": source,
                "source_location": where,
            }
        )
        return cls(epochs)

    @classmethod
    def read_csv(cls, path: Path) -> StationMetadata:
        """Read a station CSV (columns in the module docstring; header required).

        Raises
        ------
        FileNotFoundError
            If ``path`` does not exist.
        MalformedFileError
            If a column is missing or a value is invalid; names file, line and fix.
        """
        path = Path(path)
        if not path.is_file():
            raise FileNotFoundError(f"{path}: station file not found")
        raw = pd.read_csv(
            path, dtype=str, keep_default_na=False, skip_blank_lines=False, encoding="utf-8"
        )
        raw.columns = [str(c).strip() for c in raw.columns]
        raw["source_location"] = [f"line {i + 2}" for i in range(len(raw))]
        blank = (raw.drop(columns="source_location").apply(lambda c: c.str.strip()) == "").all(
            axis=1
        )
        return cls.from_frame(raw.loc[~blank], source=str(path))

    @classmethod
    def read(cls, path: Path) -> StationMetadata:
        """Read a station file, StationXML or station CSV, told apart by its first bytes.

        A file whose first non-blank character is ``<`` is read as StationXML
        (:meth:`read_stationxml`), any other as a station CSV (:meth:`read_csv`).

        Raises
        ------
        FileNotFoundError
            If ``path`` does not exist.
        MalformedFileError
            As the reader chosen.
        """
        path = Path(path)
        if not path.is_file():
            raise FileNotFoundError(f"{path}: station file not found")
        with path.open("rb") as handle:
            head = handle.read(512).lstrip(b"\xef\xbb\xbf \t\r\n")
        return cls.read_stationxml(path) if head.startswith(b"<") else cls.read_csv(path)

    @classmethod
    def read_stationxml(cls, path: Path) -> StationMetadata:
        """Read a FDSN StationXML file through ``obspy.read_inventory``.

        Raises
        ------
        FileNotFoundError
            If ``path`` does not exist.
        MalformedFileError
            If obspy cannot read it as StationXML.
        """
        from obspy import read_inventory

        path = Path(path)
        if not path.is_file():
            raise FileNotFoundError(f"{path}: StationXML file not found")
        try:
            inventory = read_inventory(str(path), format="STATIONXML")
        except Exception as exc:  # obspy raises many types for a bad file; re-raise typed
            raise MalformedFileError(
                f"{path}: not a readable StationXML file ({type(exc).__name__}: {exc}); "
                "check the file or export it again"
            ) from exc
        return cls.from_inventory(inventory, source=str(path))

    @classmethod
    def from_inventory(
        cls, inventory: Inventory, *, source: str = "<inventory>"
    ) -> StationMetadata:
        """Epochs from an obspy :class:`~obspy.core.inventory.Inventory` (see module docstring).

        Raises
        ------
        MalformedFileError
            If a code is not an FDSN code or coordinates are missing or out of range.
        """
        rows: list[dict[str, Any]] = []
        for net in inventory:
            for sta in net:
                channels = list(sta) or [None]
                for cha in channels:
                    holder = sta if cha is None else cha
                    rows.append(
                        {
                            "network": net.code,
                            "station": sta.code,
                            "location": "" if cha is None else cha.location_code,
                            "latitude": holder.latitude,
                            "longitude": holder.longitude,
                            "elevation": holder.elevation,
                            "start": _utc_text(holder.start_date),
                            "end": _utc_text(holder.end_date),
                            "source_location": (
                                f"station {net.code}.{sta.code}"
                                if cha is None
                                else f"channel {net.code}.{sta.code}.{cha.location_code}.{cha.code}"
                            ),
                        }
                    )
        if not rows:
            raise MalformedFileError(f"{source}: the inventory holds no station; check the file")
        frame = pd.DataFrame(rows)
        meta = cls.from_frame(frame, source=source)
        epochs = meta._epochs.drop_duplicates(
            subset=["station_id", "latitude", "longitude", "elevation_m", "start", "end"]
        )
        return cls(epochs)

    @classmethod
    def concat(cls, parts: Iterable[StationMetadata]) -> StationMetadata:
        """All epochs of several metadata sets (overlaps are resolved at look-up)."""
        frames = [p._epochs for p in parts]
        if not frames:
            raise ValueError("concat needs at least one StationMetadata")
        return cls(pd.concat(frames, ignore_index=True))

    # -- inspection ------------------------------------------------------------------------
    @property
    def epochs(self) -> pd.DataFrame:
        """A copy of the epoch table (:data:`EPOCH_COLUMNS`), sorted by station and start."""
        return self._epochs.copy()

    @property
    def station_ids(self) -> tuple[str, ...]:
        """The distinct station identifiers, sorted."""
        return tuple(pd.unique(self._epochs["station_id"]))

    def __len__(self) -> int:
        return len(self._epochs)

    def __repr__(self) -> str:
        return f"StationMetadata({len(self.station_ids)} stations, {len(self)} epochs)"

    # -- look-up ---------------------------------------------------------------------------
    def lookup(self, station_id: ArrayLike, time: ArrayLike) -> StationLookup:
        """Coordinates of each (station, time) pair, vectorized; never raises for a miss.

        Parameters
        ----------
        station_id : array_like of str, shape (n,)
            ``NET.STA.LOC`` identifiers.
        time : array_like of datetime, shape (n,)
            Times (tz-aware, or naive = UTC, or ISO 8601 strings).

        Returns
        -------
        StationLookup
            Coordinates where found, and a one-line problem for each miss.
        """
        sid = np.asarray(station_id, dtype=object).astype(str)
        t = _to_utc(time)
        n = sid.shape[0]
        if len(t) != n:
            raise ValueError("station_id and time differ in length")
        epochs = self._epochs
        query = pd.DataFrame({"q": np.arange(n), "station_id": sid, "t": t.array})
        known = query["station_id"].isin(set(epochs["station_id"]))
        ep = epochs.assign(e=np.arange(len(epochs)), loc=_location(epochs["station_id"]))
        exact = query.loc[known].merge(ep, on="station_id", how="inner")
        net_sta = query.loc[~known].assign(key=_net_sta(query.loc[~known, "station_id"]))
        fallback = net_sta.merge(ep.assign(key=_net_sta(ep["station_id"])), on="key")
        fallback = fallback.drop(columns=["station_id_y", "key"]).rename(
            columns={"station_id_x": "station_id"}
        )
        cand = pd.concat([exact, fallback], ignore_index=True)
        valid = (cand["start"].isna() | (cand["start"] <= cand["t"])) & (
            cand["end"].isna() | (cand["t"] < cand["end"])
        )
        cand = cand.loc[valid].sort_values(["q", "loc", "start"], na_position="first")
        grouped = cand.groupby("q", sort=False)[["latitude", "longitude", "elevation_m"]]
        spread = grouped.max() - grouped.min()
        ambiguous_q = spread.index[
            (spread["latitude"] > _COORD_TOLERANCE_DEG)
            | (spread["longitude"] > _COORD_TOLERANCE_DEG)
            | (spread["elevation_m"].fillna(0.0) > _ELEVATION_TOLERANCE_M)
        ].to_numpy()
        first = cand.drop_duplicates("q", keep="first")
        first = first.loc[~first["q"].isin(ambiguous_q)]

        epoch = np.full(n, -1, dtype=np.int64)
        epoch[first["q"].to_numpy()] = first["e"].to_numpy()
        hit = epoch >= 0
        lat = np.full(n, np.nan)
        lon = np.full(n, np.nan)
        elev = np.full(n, np.nan)
        lat[hit] = epochs["latitude"].to_numpy()[epoch[hit]]
        lon[hit] = epochs["longitude"].to_numpy()[epoch[hit]]
        elev[hit] = epochs["elevation_m"].to_numpy()[epoch[hit]]

        problem = (
            np.full(n, "", dtype=object)
            if np.all(hit)
            else self._problems(query, known.to_numpy(), hit, ambiguous_q, cand)
        )
        return StationLookup(
            latitude=lat, longitude=lon, elevation_m=elev, epoch=epoch, problem=problem
        )

    def _problems(
        self,
        query: pd.DataFrame,
        known: NDArray[np.bool_],
        hit: NDArray[np.bool_],
        ambiguous_q: NDArray[np.int64],
        cand: pd.DataFrame,
    ) -> NDArray[np.object_]:
        """One-line reasons for the rows without a usable epoch (vectorized string building)."""
        epochs = self._epochs
        sid = query["station_id"]
        when = _iso(query["t"])
        span = _iso(epochs["start"]) + ".." + _iso(epochs["end"])
        # Epoch listings keyed by exact id, and by "~NET.STA" for the location fallback.
        table = pd.concat(
            [
                pd.DataFrame({"key": epochs["station_id"], "text": span, "src": epochs["source"]}),
                pd.DataFrame(
                    {"key": "~" + _net_sta(epochs["station_id"]), "text": span,
                     "src": epochs["source"]}
                ),
            ],
            ignore_index=True,
        )  # fmt: skip
        by_key = table.groupby("key")
        key = sid.where(known, "~" + _net_sta(sid))
        listing = key.map(by_key["text"].agg(" ".join))
        source = key.map(by_key["src"].first())
        quoted = "station '" + sid + "'"

        problem = pd.Series("", index=query.index, dtype=object)
        unknown = listing.isna().to_numpy() & ~hit
        sources = ", ".join(sorted(set(epochs["source"])))
        problem[unknown] = (
            quoted[unknown] + f" is not in the station metadata ({sources}); add it there or "
            "correct the station code"
        )
        ambiguous = np.isin(query["q"].to_numpy(), ambiguous_q)
        if np.any(ambiguous):
            clash = cand.loc[cand["q"].isin(ambiguous_q)].groupby("q")["source_location"]
            where = query["q"].map(clash.agg(", ".join))
            problem[ambiguous] = (
                quoted[ambiguous] + " has several metadata epochs valid at " + when[ambiguous]
                + " with different coordinates (" + where[ambiguous] + "); remove the overlap in "
                + source[ambiguous]
            )  # fmt: skip
        outside = ~hit & ~unknown & ~ambiguous
        problem[outside] = (
            quoted[outside] + " has no metadata epoch valid at " + when[outside] + " (epochs: "
            + listing[outside] + "); add or extend an epoch in " + source[outside]
        )  # fmt: skip
        return problem.to_numpy(dtype=object)

    def coordinates(self, station_id: ArrayLike, time: ArrayLike) -> StationLookup:
        """Like :meth:`lookup`, but raise for the first row without a usable epoch.

        Raises
        ------
        StationNotFoundError
            For an unknown station, a time outside every epoch, or ambiguous epochs; the message
            names the station and time.
        """
        found = self.lookup(station_id, time)
        bad = np.flatnonzero(~found.found)
        if bad.size:
            more = f" (and {bad.size - 1} more rows)" if bad.size > 1 else ""
            raise StationNotFoundError(f"{found.problem[bad[0]]}{more}")
        return found

    def locate(self, station_id: str, time: Any) -> StationEpoch:
        """The epoch of one station at one time.

        Raises
        ------
        StationNotFoundError
            As :meth:`coordinates`.
        """
        found = self.coordinates([station_id], [time])
        row = self._epochs.iloc[int(found.epoch[0])]
        return StationEpoch(
            station_id=str(row["station_id"]),
            latitude=float(row["latitude"]),
            longitude=float(row["longitude"]),
            elevation_m=float(row["elevation_m"]),
            start=None if pd.isna(row["start"]) else row["start"],
            end=None if pd.isna(row["end"]) else row["end"],
            source=str(row["source"]),
            source_location=str(row["source_location"]),
        )


# -- parsing helpers -------------------------------------------------------------------------
def _utc_text(value: Any) -> str:
    """An obspy UTCDateTime (or None) as ISO 8601 text in UTC."""
    return "" if value is None else f"{value.isoformat()}Z"


def _location(station_id: pd.Series) -> pd.Series:
    return station_id.str.rsplit(".", n=1).str[1]


def _net_sta(station_id: pd.Series) -> pd.Series:
    return pd.Series(station_id, dtype=object).astype(str).str.rsplit(".", n=1).str[0]


def _station_ids(
    network: pd.Series, station: pd.Series, location: pd.Series, where: NDArray[Any], source: str
) -> NDArray[np.object_]:
    """FDSN identifiers, validated once per distinct code triple."""
    joined = (network + "\x1f" + station + "\x1f" + location).to_numpy(dtype=str)
    codes, inverse = np.unique(joined, return_inverse=True)
    ids = np.empty(codes.shape[0], dtype=object)
    for k, code in enumerate(codes):
        net, sta, loc = code.split("\x1f")
        try:
            ids[k] = normalise_station_id(net, sta, loc)
        except ValueError as exc:
            i = int(np.flatnonzero(inverse == k)[0])
            raise MalformedFileError(f"{source}: {where[i]}: {exc}; fix the codes") from None
    return ids[inverse]


def _numbers(
    text: pd.Series, column: str, where: NDArray[Any], source: str, *, required: bool
) -> NDArray[np.float64]:
    values = pd.to_numeric(text.replace("", None), errors="coerce").to_numpy(dtype=np.float64)
    bad = np.isnan(values) & ((text != "").to_numpy() | required)
    bad |= np.isinf(values)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise MalformedFileError(
            f"{source}: {where[i]}: column {column!r} needs a number, got "
            f"{text.iloc[i]!r}; fix the value"
        )
    return values


def _check_range(
    values: NDArray[np.float64], low: float, high: float, column: str, where: NDArray[Any],
    source: str,
) -> None:  # fmt: skip
    bad = (values < low) | (values > high)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise MalformedFileError(
            f"{source}: {where[i]}: {column} {values[i]:g} is outside [{low:g}, {high:g}] "
            "degrees; fix the coordinate"
        )


def _times(text: pd.Series, column: str, where: NDArray[Any], source: str) -> pd.Series:
    parsed = pd.to_datetime(
        text.replace("", None), utc=True, format="ISO8601", errors="coerce"
    ).astype(_UTC)
    bad = (parsed.isna() & (text != "")).to_numpy()
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise MalformedFileError(
            f"{source}: {where[i]}: column {column!r} needs an ISO 8601 time (UTC), got "
            f"{text.iloc[i]!r}; fix the value or leave it empty for an open epoch"
        )
    return parsed.reset_index(drop=True)
