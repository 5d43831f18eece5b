"""The demonstration store: one SQLite file (WAL mode) holding demonstrations as chunks of
little-endian float64 columns with per-demonstration summary columns, learned skills with
provenance, and replay results with their traces. Built on sqlite-utils (``store.db``).

``DemoStore`` is the public face; each concern lives in its own module and works on the store's
:class:`~compliant_demo.store._session.StoreSession`: ``_recording`` (writer leases, recording),
``_queries``, ``_curation`` (with ``merge``), ``_results`` (skills, campaigns, replay results),
``_verdicts`` (readiness verdicts) and ``_rows`` (row builders and validators).
"""

from __future__ import annotations

import inspect
import os
from collections.abc import Iterator, Mapping, Sequence
from datetime import datetime
from types import TracebackType
from typing import TYPE_CHECKING, Any

import numpy as np
import sqlite_utils

from compliant_demo.exceptions import NotFoundError, StoreError
from compliant_demo.store import (
    _codec,
    _curation,
    _ids,
    _queries,
    _recording,
    _results,
    _verdicts,
)
from compliant_demo.store._recording import CHUNK_SAMPLES, FINAL_STATUSES
from compliant_demo.store._rows import choice, finite, parameters_document
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import (
    CampaignInfo,
    CampaignProgress,
    Demonstration,
    DemonstrationInfo,
    MergeReport,
    ReplayParameters,
    ReplayResult,
    ReplayResultInfo,
    SkillRecord,
    VerdictRecord,
)

if TYPE_CHECKING:
    import pandas

    from compliant_demo.readiness import Verdict

__all__ = ["DemoStore", "CHUNK_SAMPLES"]


class DemoStore:
    """A demonstration store in one SQLite file, or in memory.

    Parameters
    ----------
    path : str or path-like, default ":memory:"
        Store file. A missing file is created (mode 0o640) unless ``read_only`` or not ``create``.
    read_only : bool
        Open without write access; writes raise StoreReadOnlyError.
    busy_timeout_s : float, s
        How long a write waits for another writer before raising StoreBusyError.
    create : bool
        Create the file when missing (otherwise NotFoundError).
    durable : bool
        Sync every commit to disk (SQLite ``synchronous=FULL``), so a committed chunk survives a
        power cut. ``False`` (``NORMAL``) still survives a crash of the writing process and is
        faster for bulk work.
    query_timeout_s : float, s
        How long a query with a caller's raw SQL ``where`` may run before it is stopped and
        refused with InvalidInputError (such a condition can otherwise run for hours inside
        SQLite, where no signal reaches it).

    Notes
    -----
    Opening writable creates or migrates the schema and turns every demonstration still
    "recording" whose writer process is gone into "incomplete" (see ``_lease``). One object may
    be shared between threads; its calls are serialised.
    """

    def __init__(
        self,
        path: str | os.PathLike[str] = ":memory:",
        *,
        read_only: bool = False,
        busy_timeout_s: float = 5.0,
        create: bool = True,
        durable: bool = True,
        query_timeout_s: float = 10.0,
    ) -> None:
        self.read_only = bool(read_only)
        self.query_timeout_s = finite("query_timeout_s", query_timeout_s, positive=True)
        self._session = StoreSession(
            path, read_only=self.read_only, busy_timeout_s=busy_timeout_s, create=create,
            durable=durable,
        )  # fmt: skip
        self.path = self._session.path
        self.schema_version = self._session.schema_version
        self.db = sqlite_utils.Database(self._session.conn)
        try:
            if not self.read_only:
                self.recover_dead_writers()
        except BaseException:
            self._session.close()
            raise

    # -- life cycle -------------------------------------------------------------------------

    def __enter__(self) -> DemoStore:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"DemoStore({str(self.path) if self.path else ':memory:'!r})"

    def close(self) -> None:
        """Close the store; demonstrations this object was still recording become "incomplete"."""
        with self._session.lock:
            if self._session.closed:
                return
            try:
                _recording.release_on_close(self._session)
            finally:
                self._session.close()

    def integrity_check(self) -> list[str]:
        """``PRAGMA integrity_check`` and ``foreign_key_check``; ``["ok"]`` for a sound file."""
        return _curation.integrity_problems(self._session)

    def verify(self) -> list[str]:
        """Every finding in the store, one line each (``[]`` for a sound store).

        Runs :meth:`integrity_check`, then reads every chunk of every demonstration and checks
        it against the demonstration's metadata: the chunk sequence 0, 1, ... without gaps, the
        sample counts, blob sizes, each chunk's SHA-256 digest and the time order.
        """
        return _curation.verify(self._session)

    # -- writer leases and recording ----------------------------------------------------------

    def recover_dead_writers(self) -> list[str]:
        """Mark "incomplete" every recording demonstration whose writer process is gone.

        Returns
        -------
        list of str
            Ids of the demonstrations that were recovered.
        """
        return _recording.recover_dead_writers(self._session)

    def begin_demonstration(
        self,
        *,
        skill: str,
        joints: Sequence[str],
        operator: str = "",
        tags: Sequence[str] = (),
        notes: str = "",
        source: str = "recorded",
        nominal_rate_hz: float = 1000.0,
        start_time: float | datetime | None = None,
        with_stiffness: bool = True,
        demo_id: str | None = None,
    ) -> str:
        """Start a demonstration in status "recording"; returns its UUID.

        Parameters
        ----------
        skill : str
            Name of the skill demonstrated (non-empty).
        joints : sequence of str
            Joint names, the column order of every sample array.
        operator, notes : str
        tags : sequence of str
        source : {"recorded", "imported", "simulated"}
        nominal_rate_hz : float, Hz
        start_time : float (Unix time, s) or datetime, optional
            Absolute time of ``t = 0``; now when omitted.
        with_stiffness : bool
            Whether chunks carry the stiffness channel.
        demo_id : str, optional
            UUID to use (imports keep ids); a fresh UUID4 when omitted.
        """
        fields = {k: v for k, v in locals().items() if k != "self"}
        with self._session.transaction() as conn:
            return _recording.begin(self._session, conn, fields)

    def append_chunk(
        self,
        demo_id: str,
        t: np.ndarray,
        position: np.ndarray,
        velocity: np.ndarray,
        torque: np.ndarray,
        stiffness: np.ndarray | None = None,
    ) -> int:
        """Append samples to a recording demonstration in one atomic transaction.

        Parameters
        ----------
        demo_id : str
        t : (n,) array, s
            Relative to the demonstration start; strictly increasing and after every stored time.
        position : (n, n_joints) array, rad
        velocity : (n, n_joints) array, rad/s
        torque : (n, n_joints) array, N*m
        stiffness : (n, n_joints) array, N*m/rad, optional
            Required exactly when the demonstration was begun ``with_stiffness``.

        Returns
        -------
        int
            Sample count of the demonstration after the append.
        """
        times, arrays = _recording.validated_chunk(
            self._session,
            demo_id,
            t,
            {"position": position, "velocity": velocity, "torque": torque, "stiffness": stiffness},
        )
        with self._session.transaction() as conn:
            return _recording.append(self._session, conn, demo_id, times, arrays)

    def finish_demonstration(
        self, demo_id: str, status: str = "complete", flags: Mapping[str, Any] | None = None
    ) -> DemonstrationInfo:
        """End a recording: set its final status, merge ``flags``, compute the summary columns.

        Parameters
        ----------
        demo_id : str
        status : {"complete", "incomplete", "rejected"}
        flags : mapping of str to int, optional
            Counters such as ``{"drops": 3}``; each replaces an earlier value of the same key.
        """
        choice("status", status, FINAL_STATUSES)
        checked = None if flags is None else _codec.validate_flags(flags)
        with self._session.transaction() as conn:
            current = _recording.status_of(self._session, conn, demo_id)
            if current != "recording":
                raise StoreError(
                    f"demonstration {demo_id!r} is {current!r}, not 'recording': already finished"
                )
            _recording.finish(self._session, conn, demo_id, status, checked)
        return self.get_info(demo_id)

    def update_flags(self, demo_id: str, flags: Mapping[str, Any]) -> dict[str, Any]:
        """Merge counters into a demonstration's flags (a key's new value replaces the old one,
        so send cumulative counts); returns the merged flags."""
        checked = _codec.validate_flags(flags)
        with self._session.transaction() as conn:
            _recording.status_of(self._session, conn, demo_id)
            _recording.merge_flags(self._session, conn, demo_id, checked)
        return dict(self.get_info(demo_id).flags)

    def add_demonstration(
        self,
        *,
        t: np.ndarray,
        position: np.ndarray,
        velocity: np.ndarray,
        torque: np.ndarray,
        stiffness: np.ndarray | None = None,
        status: str = "complete",
        flags: Mapping[str, Any] | None = None,
        **begin_kwargs: Any,
    ) -> str:
        """Store a whole demonstration in one transaction; returns its UUID.

        Takes the samples of :meth:`append_chunk`, ``status`` and ``flags`` of
        :meth:`finish_demonstration` and the keywords of :meth:`begin_demonstration`
        (``with_stiffness`` defaults to whether ``stiffness`` is given).
        """
        begin_kwargs.setdefault("with_stiffness", stiffness is not None)
        # the keywords of begin_demonstration with its defaults; unknown ones raise TypeError
        bound = inspect.signature(self.begin_demonstration).bind(**begin_kwargs)
        bound.apply_defaults()
        fields = dict(bound.arguments)
        choice("status", status, FINAL_STATUSES)
        checked = None if flags is None else _codec.validate_flags(flags)
        joints = _codec.validate_joints(fields["joints"])
        times, arrays = _codec.validate_chunk(
            t,
            {"position": position, "velocity": velocity, "torque": torque, "stiffness": stiffness},
            n_joints=len(joints),
            with_stiffness=bool(fields["with_stiffness"]),
        )
        session = self._session
        with session.transaction() as conn:
            demo_id = _recording.begin(session, conn, fields)
            for start in range(0, times.size, CHUNK_SAMPLES):
                part = slice(start, start + CHUNK_SAMPLES)
                chunk = {k: v[part] for k, v in arrays.items()}
                _recording.append(session, conn, demo_id, times[part], chunk)
            _recording.finish(session, conn, demo_id, status, checked)
        return demo_id

    # -- queries ----------------------------------------------------------------------------

    def find_demonstrations(
        self,
        *,
        skill: str | None = None,
        operator: str | None = None,
        tag: str | Sequence[str] | None = None,
        status: str | Sequence[str] | None = None,
        source: str | None = None,
        started_after: float | datetime | None = None,
        started_before: float | datetime | None = None,
        min_duration_s: float | None = None,
        where: str | None = None,
        where_args: Sequence[object] | Mapping[str, object] | None = None,
        order_by: str | None = None,
        limit: int | None = None,
    ) -> Iterator[DemonstrationInfo]:
        """Metadata of the demonstrations matching every given filter.

        Parameters
        ----------
        skill, operator, source : str, optional
            Exact match.
        tag : str or sequence of str, optional
            Demonstrations carrying every one of these tags.
        status : str or sequence of str, optional
            Any of these statuses.
        started_after, started_before : float (Unix time, s) or datetime, optional
            ``started_after <= start_time < started_before``.
        min_duration_s : float, s, optional
        where : str, optional
            Extra SQL condition over the columns of ``demonstrations`` (read-only: a condition
            that would write, attach or set pragmas is refused).
        where_args : sequence or mapping, optional
            Parameters of ``where`` (``?`` or ``:name`` placeholders).
        order_by : str, optional
            ``"column [asc|desc], ..."`` or ``"-column"``; default ``"start_time, id"``.
        limit : int, optional

        Returns
        -------
        iterator of DemonstrationInfo
            The query runs (and bad filters raise) when this is called, not when iterated.
        """
        # every keyword of this signature but order_by and limit is a filter
        filters = {k: v for k, v in locals().items() if k in _queries.FILTER_KEYWORDS}
        return iter(_queries.find(self._session, filters, order_by, limit, self.query_timeout_s))

    def count_demonstrations(self, **filters: Any) -> int:
        """Number of demonstrations matching the filters of :meth:`find_demonstrations`."""
        return _queries.count(self._session, filters, self.query_timeout_s)

    def get_info(self, demo_id: str) -> DemonstrationInfo:
        """Metadata and summary of one demonstration."""
        with self._session.snapshot() as conn:
            return _queries.info(self._session, conn, demo_id)

    def load_demonstration(
        self, demo_id: str, *, joints: Sequence[str] | None = None
    ) -> Demonstration:
        """Samples of one demonstration as numpy arrays (see :class:`Demonstration`).

        Parameters
        ----------
        demo_id : str
        joints : sequence of str, optional
            Load only these joints, in this order.

        Notes
        -----
        One SELECT over the chunks, one ``np.frombuffer`` per channel; the returned arrays are
        read-only views (copy them to modify). Metadata and samples come from one snapshot, so a
        demonstration still recording loads consistently.
        """
        return _queries.load(self._session, demo_id, joints)

    def load_dataframe(self, demo_id: str) -> pandas.DataFrame:
        """One demonstration as a pandas DataFrame indexed by ``t`` (s), with columns
        ``position.<joint>``, ``velocity.<joint>``, ``torque.<joint>`` and, when stored,
        ``stiffness.<joint>`` (the column names of the CSV layout); metadata in
        ``frame.attrs["info"]``. Needs pandas."""
        import pandas

        demo = self.load_demonstration(demo_id)
        columns = {
            f"{channel}.{joint}": values[:, j]
            for channel in _codec.CHANNELS
            if (values := getattr(demo, channel)) is not None
            for j, joint in enumerate(demo.joints)
        }
        frame = pandas.DataFrame(columns, index=pandas.Index(demo.t, name="t"))
        frame.attrs["info"] = demo.info.to_dict()
        return frame

    def iter_demonstrations(self, **filters: Any) -> Iterator[Demonstration]:
        """Demonstrations matching the filters of :meth:`find_demonstrations`, loaded one at a
        time as the iterator advances (``joints=`` selects columns as in
        :meth:`load_demonstration`)."""
        joints = filters.pop("joints", None)
        infos = list(self.find_demonstrations(**filters))
        return (self.load_demonstration(info.id, joints=joints) for info in infos)

    # -- curation ---------------------------------------------------------------------------

    def mark_status(
        self, demo_id: str, status: str, reason: str | None = None
    ) -> DemonstrationInfo:
        """Set a finished demonstration's status ("complete", "incomplete" or "rejected").

        A demonstration still recording is refused: its writer ends it with
        :meth:`finish_demonstration` (or recovery does, when the writer is gone).
        """
        _curation.mark_status(self._session, demo_id, status, reason)
        return self.get_info(demo_id)

    def delete_demonstration(self, demo_id: str, *, force: bool = False) -> None:
        """Delete a demonstration and its samples.

        Refused while it is recording, and (unless ``force``) while a saved skill names it in
        its provenance.
        """
        _curation.delete(self._session, demo_id, force=force)

    def discard_recording(self, demo_id: str) -> None:
        """Delete a demonstration that this store object began and that is still recording
        (an import or recording that failed half-way); any other demonstration is refused."""
        _curation.discard(self._session, demo_id)

    def merge_from(self, other_path: str | os.PathLike[str]) -> MergeReport:
        """Copy into this store every finished demonstration of another store file.

        Ids are kept. A demonstration already here with identical metadata and samples is
        skipped; one with different content, or still recording in the other store, is reported
        as a conflict and left alone. Each copied demonstration is one transaction.
        """
        return _curation.merge_from(self._session, other_path)

    # -- skills, campaigns and replay results -------------------------------------------------

    def save_skill(
        self,
        name: str,
        payload: Mapping[str, Any],
        *,
        demonstration_ids: Sequence[str],
        parameters: Mapping[str, Any],
    ) -> SkillRecord:
        """Save a new version of skill ``name`` (1, 2, ... per name) with its provenance.

        Parameters
        ----------
        name : str
        payload : mapping
            The learned skill; JSON values and numpy arrays (stored exactly).
        demonstration_ids : sequence of str
            Demonstrations it was learned from; each must exist here.
        parameters : mapping
            Learning parameters used.
        """
        skill_id = _results.save_skill(self._session, name, payload, demonstration_ids, parameters)
        return self.get_skill_record(skill_id)

    def get_skill_record(self, skill_id: str) -> SkillRecord:
        """One skill version by its id."""
        found = _results.skill_rows(self._session, "WHERE s.id = ?", (skill_id,))
        if not found:
            raise NotFoundError(f"skill id {skill_id!r} not found in {self._session.label}")
        return found[0]

    def load_skill_record(self, name: str, version: int | None = None) -> SkillRecord:
        """Skill ``name`` at ``version`` (the latest when omitted)."""
        _codec.validate_text("name", name, allow_empty=False)
        versions = _results.skill_rows(self._session, "WHERE s.name = ?", (name,))
        if not versions:
            raise NotFoundError(f"skill {name!r} not found in {self._session.label}")
        if version is None:
            return versions[-1]
        for record in versions:
            if record.version == version:
                return record
        raise NotFoundError(
            f"skill {name!r} has no version {version!r} (versions: "
            f"{', '.join(str(r.version) for r in versions)})"
        )

    def list_skills(self) -> list[SkillRecord]:
        """Every saved skill version, by name then version."""
        return _results.skill_rows(self._session, "", ())

    def create_campaign(
        self, skill_id: str, config: Mapping[str, Any], campaign_id: str | None = None
    ) -> str:
        """Register a replay campaign of one skill version; returns its id.

        Calling again with an existing ``campaign_id`` and the same skill and config returns it
        unchanged (so an interrupted campaign resumes); a different config is refused.
        """
        return _results.create_campaign(self._session, skill_id, config, campaign_id)

    def list_campaigns(self) -> list[CampaignProgress]:
        """Every campaign with its skill name and version, creation time and how many of its
        planned scenarios have a stored result, oldest first."""
        return _ids.list_campaigns(self._session)

    def resolve_id(self, kind: str, prefix: str) -> str:
        """The full id of the one record of ``kind`` ("demonstration", "skill", "campaign" or
        "result") whose id is or starts with ``prefix``.

        Raises
        ------
        NotFoundError
            No such id (the message names the prefix).
        InvalidInputError
            Several ids start with ``prefix`` (the message names it and lists candidates).
        """
        return _ids.resolve_prefix(self._session, kind, prefix)

    def get_campaign(self, campaign_id: str) -> CampaignInfo:
        """One campaign's skill and configuration."""
        return _results.get_campaign(self._session, campaign_id)

    def save_replay_result(
        self,
        *,
        skill_id: str,
        metrics: Mapping[str, Any],
        parameters: ReplayParameters,
        status: str = "ok",
        reason: str | None = None,
        trace: Mapping[str, np.ndarray] | None = None,
        campaign_id: str | None = None,
        scenario_index: int | None = None,
    ) -> str:
        """Store the outcome of one replay; returns its id.

        Parameters
        ----------
        skill_id : str
            Id of the replayed skill version.
        metrics : mapping
            Outcome metrics.
        parameters : ReplayParameters
            What the replay was run with (perturbation, plant, step, seed ...).
        status : str
            "ok" or a short word for what went wrong; ``reason`` explains it.
        trace : mapping of str to array, optional
            Time series of the replay, stored as float64 with their shapes.
        campaign_id : str, optional
        scenario_index : int, optional
            Index of the scenario within the campaign (needs ``campaign_id``); one result each.
        """
        return _results.save_replay_result(
            self._session,
            skill_id=skill_id,
            metrics=metrics,
            parameters_text=_codec.dumps(parameters_document(parameters)),
            status=status,
            reason=reason,
            trace=trace,
            campaign_id=campaign_id,
            scenario_index=scenario_index,
        )

    def find_replay_results(
        self,
        *,
        skill_id: str | None = None,
        campaign_id: str | None = None,
        status: str | None = None,
    ) -> Iterator[ReplayResultInfo]:
        """Replay results (without traces) by skill version, campaign and status."""
        filters = {"skill_id": skill_id, "campaign_id": campaign_id, "status": status}
        return iter(_results.find_replay_results(self._session, filters))

    def load_replay_result(self, result_id: str) -> ReplayResult:
        """One replay result with its trace arrays."""
        return _results.load_replay_result(self._session, result_id)

    def completed_scenarios(self, campaign_id: str) -> set[int]:
        """Scenario indices of a campaign that already have a result (to resume a campaign)."""
        return _results.completed_scenarios(self._session, campaign_id)

    # -- readiness verdicts -----------------------------------------------------------------

    def save_verdict(
        self,
        verdict: Verdict,
        *,
        skill_id: str,
        plant_digest: str,
        criteria_digest: str,
        campaign_id: str | None,
        criteria: dict[str, Any],
    ) -> str:
        """Store a readiness verdict of a skill version on a plant; its id.

        Parameters
        ----------
        verdict : :class:`compliant_demo.readiness.Verdict`
        skill_id : id of the skill version judged
        plant_digest : :attr:`compliant_demo.plant.ReplayPlant.digest` of the plant
        criteria_digest : :attr:`compliant_demo.readiness.Criteria.digest`; must be the digest
            of ``criteria`` (InvalidInputError otherwise)
        campaign_id : campaign of that skill whose scenarios the verdict counts, or None
        criteria : the criteria as JSON (``Criteria.model_dump(mode="json")``)
        """
        return _verdicts.save_verdict(
            self._session, verdict, skill_id=skill_id, plant_digest=plant_digest,
            criteria_digest=criteria_digest, campaign_id=campaign_id, criteria=criteria,
        )  # fmt: skip

    def latest_verdict(
        self, skill_id: str, *, plant_digest: str, criteria_digest: str
    ) -> VerdictRecord | None:
        """The newest stored verdict of ``skill_id`` on the plant and criteria with these
        digests, or None when there is none."""
        return _verdicts.latest_verdict(
            self._session, skill_id, plant_digest=plant_digest, criteria_digest=criteria_digest
        )
