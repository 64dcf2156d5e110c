"""The campaign flow: plan the designs, keep ``slots`` cases in flight, record and score each.

The flow is the conductor and the ledger is the record. All ledger writes happen here, in the
flow's main thread; case tasks only run the adapter and report through a queue. Each finished
case is written at once, and a design is scored as soon as its last case is in, so a campaign
stopped at any moment keeps everything that finished.

Each event costs the same however large the campaign: a finished case reads only its own
design's cases, the plan's decisions read counts, and only a surrogate fit reads every design
(it needs them). The conductor keeps no state the ledger cannot rebuild at start-up.
"""

from __future__ import annotations

import queue
import threading
import time
import warnings
from collections import deque
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from sklearn.exceptions import ConvergenceWarning

from sortie.flows.runtime import configure_prefect

configure_prefect()

from prefect import flow, task  # noqa: E402  (settings must be in the environment first)
from prefect.cache_policies import NO_CACHE  # noqa: E402
from prefect.exceptions import TerminationSignal  # noqa: E402
from prefect.futures import PrefectFuture  # noqa: E402
from prefect.settings import PREFECT_FLOWS_HEARTBEAT_FREQUENCY, temporary_settings  # noqa: E402
from prefect.states import Cancelled, Completed, Failed, State  # noqa: E402
from prefect.task_runners import ThreadPoolTaskRunner  # noqa: E402

from sortie import campaign as campaign_folder  # noqa: E402
from sortie import stages  # noqa: E402
from sortie.adapters.base import CaseOutcome, CaseSpec, JobHandle, JobState, SolverAdapter  # noqa: E402
from sortie.adapters.registry import build_adapter  # noqa: E402
from sortie.config import CampaignConfig  # noqa: E402
from sortie.errors import CampaignError, SortieError  # noqa: E402
from sortie.goal import Composition, Goal, read_outputs  # noqa: E402
from sortie.infill import MIN_POINTS, History, InfillSettings, fit_models, optimize_surface, propose_infill  # noqa: E402
from sortie.ledger import CaseRow, Ledger, ledger_path  # noqa: E402
from sortie.plan import first_designs, initial_designs  # noqa: E402
from sortie.runstate import Terminated  # noqa: E402
from sortie.space import DesignSpace  # noqa: E402

TERMINAL = (JobState.DONE, JobState.FAILED)
# The end-of-plan Sobol' indices are computed on a GP fitted to at most this many finished designs
# (a seeded random subset). On 2,500 designs of 8 parameters the fit and the 10,240 predictions
# took 37 s and 600 MB more memory; on 500, 8 s and 106 MB; on 300, 3.4 s and 66 MB (a loaded
# 2-core machine). Indices of a smooth surrogate do not need more points than that.
INDICES_MAX_DESIGNS = 300


@dataclass(frozen=True)
class _Started:
    case_id: int
    handle: JobHandle


@dataclass(frozen=True)
class _Finished:
    """A case task's end, sent by the task itself: its outcome, None (interrupted) or the exception it raised.

    Carrying the result here spares the conductor a round trip through Prefect's event loop per
    case (``future.result()``), which cost milliseconds each with the slots busy.
    """

    case_id: int
    result: CaseOutcome | BaseException | None


@dataclass(frozen=True)
class _Ended:
    """Prefect's word that a case task is over; it matters only if the task could not send :class:`_Finished`."""

    case_id: int
    future: PrefectFuture[None]


@dataclass
class _Stop:
    """Set when the run is interrupted; case tasks then stop watching their jobs."""

    event: threading.Event = field(default_factory=threading.Event)
    cancel_detached: bool = False

    def cancels(self, adapter: SolverAdapter) -> bool:
        """Whether an interrupted run cancels this adapter's jobs (local ones always)."""
        return not adapter.detached or self.cancel_detached


@task(name="run-case", task_run_name="solve-{case.name}", cache_policy=NO_CACHE)
def run_case(case: CaseSpec, adapter: SolverAdapter, inbox: queue.Queue[Any], stop: _Stop,
             handle: JobHandle | None = None) -> None:
    """Run one case through the solver adapter until it ends (or watch a re-attached job).

    The outcome (or the exception) goes to the conductor's inbox as :class:`_Finished`; it is
    None when the run was interrupted first: the job was then cancelled, or left running for
    the next run to re-attach if the adapter's jobs outlive the orchestrator. The task returns
    nothing: Prefect keeps a state for every object a task returns until its flow run ends,
    which in a campaign of 10,000 cases was tens of megabytes.
    """
    try:
        outcome = _watch_case(case, adapter, inbox, stop, handle)
    except Exception as exc:
        inbox.put(_Finished(case.case_id, exc))
        raise
    inbox.put(_Finished(case.case_id, outcome))


def _watch_case(case: CaseSpec, adapter: SolverAdapter, inbox: queue.Queue[Any], stop: _Stop,
                handle: JobHandle | None) -> CaseOutcome | None:
    if handle is None:
        handle = adapter.start(case)
        inbox.put(_Started(case.case_id, handle))
    try:
        while adapter.poll(handle) not in TERMINAL:
            if stop.event.wait(adapter.poll_interval_s):
                if stop.cancels(adapter):
                    adapter.cancel(handle)
                return None
    except BaseException:
        if stop.cancels(adapter):
            adapter.cancel(handle)
        raise
    return adapter.collect(handle, case)


@dataclass
class _Conductor:
    """Keeps the slots busy and writes every state change to the ledger (main thread only)."""

    directory: Path
    config: CampaignConfig
    ledger: Ledger
    adapter: SolverAdapter
    goal: Goal = field(init=False)
    conditions: list[dict[str, float]] = field(init=False)
    inbox: queue.Queue[Any] = field(default_factory=queue.Queue)
    in_flight: dict[int, tuple[CaseSpec, JobHandle | None]] = field(default_factory=dict)
    tasks: dict[int, PrefectFuture[Any]] = field(default_factory=dict)  # the task of each case in flight
    waiting: deque[int] = field(default_factory=deque)  # case ids, not rows: memory stays flat
    stop: _Stop = field(default_factory=_Stop)
    not_before: dict[int, float] = field(default_factory=dict)
    stop_reason: str | None = None
    infill_note: str | None = None
    kernels: dict[str, Any] | None = None
    left_running: int = 0
    space: DesignSpace = field(init=False)
    target_designs: int = field(init=False)
    _baseline: tuple[int, dict[str, Any] | None] | None = None  # (design id, its vectors once all done)
    composite: bool = field(init=False)

    def __post_init__(self) -> None:
        self.goal = self.config.goal.build()
        self.conditions = self.config.condition_list()
        self.space = self.config.space()
        self.target_designs = self.config.target_designs()  # draws the plan's points: once, not per event
        self.composite = self.config.surrogate_mode()[0] == "composite"

    # -- plan ------------------------------------------------------------------------------
    def plan(self) -> None:
        """Record the baseline and the screening or initial experiment (only what is not recorded yet)."""
        wanted = first_designs(self.config.plan, self.config.space(), self.config.campaign.seed)
        have = self.ledger.count_designs()
        if wanted[have:]:
            self.ledger.add_designs(wanted[have:], self.conditions)

    # -- run -------------------------------------------------------------------------------
    def run(self) -> None:
        self.reattach()
        self.waiting = deque(self.ledger.case_ids(states=("planned",)))
        for case_id in self.ledger.case_ids(states=("planned",), retried=True):
            self._schedule_retry(case_id)
        self.score_finished_designs()
        try:
            while True:
                self.fill_slots()
                if not self.in_flight:
                    if not self.waiting or self.stop_reason is not None:
                        break
                    # only retries waiting out their back-off: sleep in short steps (signals stay prompt)
                    time.sleep(min(1.0, max(0.0, min(self.not_before.get(c, 0.0) for c in self.waiting) - time.time())))
                    continue
                try:
                    # a short timeout keeps the main thread responsive to Ctrl-C and SIGTERM
                    message = self.inbox.get(timeout=1.0)
                except queue.Empty:
                    continue
                self.handle(message)
        except BaseException:
            self.abandon_in_flight("interrupted", "the campaign was interrupted")
            raise
        if self.stop_reason is None and self.ledger.count_designs() < self.target_designs and self.infill_note is None:
            done = self.ledger.count_designs(status="done")
            self.stop_reason = (f"only {done} designs were scored, fewer than the {MIN_POINTS} a surrogate needs, so the "
                                "plan cannot go on; see the failures with 'sortie status'")
        if self.stop_reason is not None:
            raise CampaignError(self.stop_reason)
        self.record_indices()

    def record_indices(self) -> None:
        """At the end of the plan, Sobol' indices of the goal surrogates over the parameters still free."""
        recorded = self.ledger.analyses("sobol")
        if recorded and recorded[-1]["data"]["n_points"] == self.ledger.count_designs():
            return  # already recorded for exactly these designs (a resume of a finished campaign)
        designs = self.ledger.designs()
        self.space = self._active_space()
        history = self.history(designs)
        if int(history.usable().sum()) < 2 * (history.n_dims + 1):
            return  # too few designs for indices worth showing
        history = _at_most(history, INDICES_MAX_DESIGNS, self.config.campaign.seed)
        models = fit_models(history, InfillSettings(models=("gp",)), self._seed(designs))
        if models is None:
            return
        data = stages.surrogate_indices(models.objective, models.margins, self.goal, [p.name for p in self.space.free],
                                        n_points=len(designs), seed=self.config.campaign.seed)
        data["fitted_on"] = len(history.X)
        self.ledger.add_analysis("sobol", data)

    def reattach(self) -> None:
        """Pick up the cases a previous run left in flight: wait for live jobs, run the rest again."""
        for case in self.ledger.cases(states=("submitting", "running")):
            spec = self._spec(case)
            attempts = self.ledger.case_attempts(case.id)
            pgid = attempts[-1]["pgid"] if attempts else None
            handle = self.adapter.attach(spec, case.job_id, pgid)
            if handle is None:
                self.ledger.requeue(case.id, why="lost", reason="the orchestrator stopped while the case ran and nothing "
                                    "of that run could be used; it runs again")
                continue
            if case.state == "submitting" or case.job_id != handle.job_id:
                self.ledger.mark_running(case.id, handle.job_id, handle.pgid)
            self.ledger.event("case-reattached", f"case {case.name} re-attached to job {handle.job_id}",
                              {"case": case.id, "job": handle.job_id})
            self.in_flight[case.id] = (spec, handle)
            self._launch(spec, handle)

    def fill_slots(self) -> None:
        """Start due cases while slots are free; when none is due, ask the plan for a new design."""
        while self.stop_reason is None and len(self.in_flight) < self.config.slots:
            row = self._pop_due()
            if row is None:
                if not self.next_design():
                    return
                continue
            self.submit(row)

    def _pop_due(self) -> CaseRow | None:
        if self.waiting and not self.not_before:  # the usual case: nothing holds back, take the oldest
            return self.ledger.case(self.waiting.popleft())
        now = time.time()
        for case_id in self.waiting:
            if self.not_before.get(case_id, 0.0) <= now:
                self.waiting.remove(case_id)
                self.not_before.pop(case_id, None)
                return self.ledger.case(case_id)
        return None

    def _schedule_retry(self, case_id: int) -> None:
        """After a failed attempt, hold the case back for its back-off (also across restarts)."""
        attempts = self.ledger.case_attempts(case_id)
        if not attempts or attempts[-1]["state"] != "failed":
            return
        last = attempts[-1]
        n = sum(a["failure_class"] == last["failure_class"] for a in attempts)
        self.not_before[case_id] = (last["ended_at"] or time.time()) + self.config.retries.wait_s(n)

    # -- infill ----------------------------------------------------------------------------
    def next_design(self) -> bool:
        """Record the next design(s) the plan calls for now; True if any were recorded.

        Stages follow each other as the ledger shows them done: screening (all its designs in,
        then the selection and the initial experiment on the selected parameters), infill (one
        design at a time, slots kept busy), then confirmation (once nothing else is pending).
        """
        plan = self.config.plan
        # decided on counts; every design is read only when a model is fitted on them
        if plan.screening is not None and not self.ledger.count_designs(stage="initial"):
            return self._finish_screening()
        n_confirm = plan.n_confirmations()
        if plan.infill is not None and self.infill_note is None and self.ledger.count_designs() < self.target_designs - n_confirm:
            self.space = self._active_space()
            return self._propose_infill(self.ledger.designs())
        if n_confirm and not self.ledger.count_designs(status="pending"):  # surfaces are fitted to every result
            self.space = self._active_space()
            return self._propose_confirmation(self.ledger.designs())
        return False

    def _finish_screening(self) -> bool:
        """Once every screening design is in: record the effects and the selection, then the initial experiment."""
        if self.ledger.count_designs(stage="screening", status="pending"):
            return False  # the selection needs every screening run
        spec = self.config.plan.screening
        assert spec is not None
        designs = self.ledger.designs()
        result = stages.screen(spec, self.config.space(), designs, self.goal, seed=self.config.campaign.seed)
        self.ledger.add_analysis("screening", result)
        self.ledger.event("screening", f"screening kept {', '.join(result['selected'])}; fixed "
                          f"{', '.join(result['fixed']) or 'none'} at baseline ({result['rule']})")
        for warning in stages.screening_warnings(result):
            self.ledger.event("screening", warning)
        self.space = self.config.space().keep_free(result["selected"])
        designs = initial_designs(self.config.plan.initial, self.space, self.config.campaign.seed, full=self.config.space())
        for design_id in self.ledger.add_designs(designs, self.conditions):  # all or none: resume sees no half experiment
            self.waiting.extend(c.id for c in self.ledger.cases(design_id=design_id))
        return True

    def _active_space(self) -> DesignSpace:
        """The campaign's space with the parameters screening left out fixed at their baseline.

        A selection changed in the config since it was recorded (an accepted change of
        plan.screening.select) is recomputed from the recorded effects and recorded anew.
        """
        spec = self.config.plan.screening
        if spec is None:
            return self.config.space()
        recorded = self.ledger.analyses("screening")
        if not recorded:
            return self.config.space()
        latest = recorded[-1]["data"]
        if latest.get("select") != spec.select.model_dump():
            latest = stages.reselect(latest, spec.select)
            self.ledger.add_analysis("screening", latest)
            self.ledger.event("screening", f"selection changed by the config ({latest['rule']}): kept {', '.join(latest['selected'])}")
        return self.config.space().keep_free(latest["selected"])

    def _propose_infill(self, designs: list[Any]) -> bool:
        spec = self.config.plan.infill
        assert spec is not None
        history = self.history(designs)
        try:
            proposal = propose_infill(history, InfillSettings.from_spec(spec), seed=self._seed(designs), warm=self.kernels)
        except ValueError as err:  # e.g. every candidate within min_distance of an existing design
            self.stop_reason = f"no further design can be proposed ({err})"
            return False
        if proposal is None:
            return False
        self.kernels = proposal.kernels
        self._record_models(proposal, history)
        if proposal.converged:
            self.infill_note = f"infill stopped: the best expected improvement {proposal.expected_improvement:.3g} fell below stop_below"
            self.ledger.event("infill-stopped", self.infill_note)
            return False
        self._record_proposal(proposal, "infill", proposal.reason())
        return True

    def _propose_confirmation(self, designs: list[Any]) -> bool:
        """Confirm the surrogates' predicted optimum with the real solver, once nothing else is pending."""
        plan = self.config.plan
        done = [d for d in designs if d.stage == "confirmation"]
        passed = [d for d in done if d.status == "done" and d.feasible]
        # a failed confirmation is followed by another while the budget allows (not on the classic path,
        # which by definition runs its one optimum once)
        cap = self.config.budget.max_designs(len(self.conditions)) if plan.classic is None else 0
        if len(done) >= plan.n_confirmations() and (passed or len(designs) >= cap):
            return False
        models = (plan.classic.models if plan.classic is not None else
                  (plan.confirmation.models if plan.confirmation is not None and plan.confirmation.models else None)
                  or (plan.infill.models if plan.infill is not None else ["quadratic"]))
        history = self.history(designs)
        avoid = self.space.to_unit([d.values for d in done]) if done else None
        confidence = plan.confirmation.confidence if plan.confirmation is not None else 0.5
        proposal = optimize_surface(history, InfillSettings(models=tuple(models)), seed=self._seed(designs), avoid=avoid,
                                    confidence=confidence)
        if proposal is None:  # too few scored designs; the end of the run says so
            return False
        self._record_models(proposal, history)
        n = len(done) + 1
        why = (f"confirmation {n}: optimum of the fitted {proposal.chosen.get('objective')} surface (SLSQP)"
               + ("" if not done or passed else f", after {len(done)} failed confirmation(s)"))
        self._record_proposal(proposal, "confirmation", why)
        return True

    def _seed(self, designs: list[Any]) -> int:
        return self.config.campaign.seed * 1000 + len(designs)

    def _record_models(self, proposal: Any, history: History) -> None:
        for target, scores in proposal.model_scores.items():
            self.ledger.add_model_choice(self._target_name(target), proposal.chosen[target], int(history.usable().sum()),
                                         [s.__dict__ for s in scores])

    def _record_proposal(self, proposal: Any, stage: str, reason: str) -> None:
        values = self.space.to_values(proposal.x[None, :])[0]
        unit = self.config.space().to_unit([values])[0]
        prediction = proposal.prediction.as_dict()
        if self.goal.sense == "maximize":
            prediction["objective_mean"] = -prediction["objective_mean"]
        prediction["constraints"] = [c.source for c in self.goal.constraints]
        design_id = self.ledger.add_design(stage=stage, reason=reason, values=values, unit=unit,
                                           conditions=self.conditions, prediction=prediction)
        self.waiting.extend(c.id for c in self.ledger.cases(design_id=design_id))

    def history(self, designs: list[Any]) -> History:
        """The finished and pending designs as arrays for the surrogates (objective to minimise),
        in the unit cube of the parameters still free."""
        sign = 1.0 if self.goal.sense == "minimize" else -1.0
        finished = [d for d in designs if d.status in ("done", "failed")]
        pending = [d for d in designs if d.status == "pending"]
        sources = [c.source for c in self.goal.constraints]
        outputs, composition = self._outputs(designs, finished) if self.composite else (None, None)
        return History(
            X=self.space.to_unit([d.values for d in finished]),
            objective=np.array([sign * d.objective if d.objective is not None else np.nan for d in finished]),
            margins=np.array([[(d.constraints or {}).get(s, np.nan) for s in sources] for d in finished],
                             dtype=float).reshape(len(finished), len(sources)),
            succeeded=np.array([d.status == "done" for d in finished], dtype=bool),
            pending=self.space.to_unit([d.values for d in pending]),
            outputs=outputs,
            composition=composition,
        )

    def _outputs(self, designs: list[Any], finished: list[Any]) -> tuple[np.ndarray | None, Composition | None]:
        """Each quantity the goal reads at each condition it reads it, per finished design (NaN where the case
        failed), and the goal as a function of them; (None, None) while a goal that needs the baseline lacks it."""
        by_design: dict[int, dict[int, CaseRow]] = {}
        for case in self.ledger.cases():
            by_design.setdefault(case.design_id, {})[case.condition_index] = case
        baseline = self._vectors(list(by_design.get(designs[0].id, {}).values())) if designs else None
        if baseline is None and self.goal.uses_baseline():
            return None, None
        names = tuple(self.config.quantities)
        composition = Composition(self.goal, names, tuple(self.conditions), baseline,
                                  read_outputs(self.goal, names, self.conditions))
        rows = []
        for d in finished:
            cases = by_design.get(d.id, {})
            rows.append([float(cases[c].quantities[q]) if c in cases and cases[c].state == "done" and cases[c].quantities
                         else np.nan for q, c in composition.outputs])
        return np.array(rows, dtype=float).reshape(len(finished), len(composition.outputs)), composition

    def _target_name(self, target: str) -> str:
        if target.startswith("constraint "):
            return self.goal.constraints[int(target.split()[1])].source
        return target

    def _spec(self, row: CaseRow) -> CaseSpec:
        values = self.ledger.design(row.design_id).values
        return CaseSpec(row.id, row.name, row.design_id, values, row.condition,
                        self.directory / campaign_folder.CASES / row.name)

    def submit(self, row: CaseRow) -> None:
        spec = self._spec(row)
        self.ledger.mark_submitting(row.id, spec.workdir)  # written before the solver starts
        self.in_flight[row.id] = (spec, None)
        self._launch(spec, None)

    def _launch(self, spec: CaseSpec, handle: JobHandle | None) -> None:
        future = run_case.submit(spec, self.adapter, self.inbox, self.stop, handle)
        self.tasks[spec.case_id] = future
        future.add_done_callback(lambda f, cid=spec.case_id: self.inbox.put(_Ended(cid, f)))

    def handle(self, message: Any) -> None:
        if isinstance(message, _Started):
            spec, _ = self.in_flight[message.case_id]
            self.in_flight[message.case_id] = (spec, message.handle)
            self.ledger.mark_running(message.case_id, message.handle.job_id, message.handle.pgid)
            return
        if isinstance(message, _Ended):
            if self.tasks.get(message.case_id) is not message.future:
                return  # the task reported its result itself (the usual case), or this is an earlier attempt's
            # the task ended without a word (Prefect failed it before our code ran): ask Prefect why
            message.future.wait()
            message = _Finished(message.case_id, message.future.result(raise_on_failure=False))
        assert isinstance(message, _Finished)
        self.tasks.pop(message.case_id, None)
        spec, _ = self.in_flight.pop(message.case_id)
        result = message.result
        if result is None:  # stopped watching after an interrupt; abandon_in_flight recorded it
            return
        if isinstance(result, SortieError):
            # A broken set-up (template, program) fails every case alike: stop, keep the case.
            self.ledger.requeue(message.case_id, why="setup", reason=str(result))
            self.stop_reason = self.stop_reason or str(result)
            return
        if isinstance(result, BaseException):
            self.ledger.requeue(message.case_id, why="error", reason=f"{type(result).__name__}: {result}")
            self.stop_reason = self.stop_reason or f"case {spec.name} hit an internal error ({type(result).__name__}: {result})"
            return
        outcome: CaseOutcome = result
        if outcome.ok:
            self.ledger.finish_case(message.case_id, quantities=outcome.quantities)
        elif self._retries_left(message.case_id, outcome.failure_class):
            self.ledger.retry_case(message.case_id, failure_class=outcome.failure_class, reason=outcome.reason or "")
            self._schedule_retry(message.case_id)
            self.waiting.append(message.case_id)
            return
        else:
            self.ledger.finish_case(message.case_id, failure_class=outcome.failure_class, reason=outcome.reason)
        self.score_finished_designs([spec.design_id])

    def _retries_left(self, case_id: int, failure_class: str | None) -> bool:
        """Whether the failure policy allows another attempt after this failure."""
        if failure_class is None:
            return False
        earlier = sum(a["failure_class"] == failure_class for a in self.ledger.case_attempts(case_id)[:-1])
        return earlier < self.config.retries.allowed(failure_class)

    def abandon_in_flight(self, why: str, reason: str) -> None:
        """Stop watching the cases in flight after an interrupt.

        Local solvers die with the run, so they are cancelled and put back in the plan. Batch
        jobs outlive it: they are left running, recorded with their job ids, for the next run to
        re-attach, unless the run was asked to cancel them.
        """
        self.stop.event.set()
        for case_id, (spec, handle) in list(self.in_flight.items()):
            if not self.stop.cancels(self.adapter):
                self.left_running += 1
                self.ledger.event("case-left-running", f"case {spec.name} left running as job "
                                  f"{handle.job_id if handle else '(being submitted)'} for the next run to re-attach",
                                  {"case": case_id})
                continue
            if handle is not None:
                self.adapter.cancel(handle)
            self.ledger.requeue(case_id, why=why, reason=reason)
        self.in_flight.clear()
        self.tasks.clear()
        if self.stop.cancels(self.adapter):
            # the interrupt may land between recording a case as submitting and launching it
            for case in self.ledger.cases(states=("submitting", "running")):
                self.ledger.requeue(case.id, why=why, reason=reason)

    # -- score -----------------------------------------------------------------------------
    def score_finished_designs(self, design_ids: list[int] | None = None) -> None:
        """Score the given designs (all unscored ones if None) whose cases have all ended.

        A finished case passes its own design, so the work per event does not grow with the
        ledger. ``None`` is for start-up (a resume) and for the moment the baseline is in, when
        designs that waited for it become scorable: one indexed query finds them.
        """
        baseline = self._baseline_vectors()
        if baseline is _BASELINE_FAILED:
            return
        if design_ids is None:
            design_ids = self.ledger.unscored_design_ids()
        needs_baseline = self.goal.uses_baseline()
        for design_id in design_ids:
            design = self.ledger.design(design_id)
            cases = self.ledger.cases(design_id=design_id) if design.status == "pending" else []
            if not cases or any(c.state not in ("done", "failed") for c in cases):
                continue
            if any(c.state == "failed" for c in cases):
                self.ledger.finish_design(design_id, status="failed")
            elif needs_baseline and baseline is None:
                continue  # scored once the baseline's cases are all in
            else:
                score = self.goal.score(self._vectors(cases), baseline, self.conditions)  # type: ignore[arg-type]
                self.ledger.finish_design(design_id, status="done", objective=score.objective,
                                          constraints=score.constraints, feasible=score.feasible)
            if design.stage == "confirmation":
                check = stages.confirmation_check(self.ledger.design(design_id), self.goal, self._actual_outputs(cases))
                self.ledger.add_analysis("confirmation", check)
                self.ledger.event("confirmation", f"design {design_id} confirmation {check['verdict']}", {"design": design_id})
            if needs_baseline and self._baseline is not None and design_id == self._baseline[0]:
                self.score_finished_designs()  # the baseline just came in: score the designs that waited for it
                return

    def _baseline_vectors(self) -> Any:
        """The baseline design's quantities (None while any of its cases is out), read once they are all in.

        Returns ``_BASELINE_FAILED`` after recording the stop when the goal needs a baseline that failed.
        """
        if self._baseline is not None and self._baseline[1] is not None:
            return self._baseline[1]
        baseline_id = self.ledger.first_design_id()
        if baseline_id is None:
            return None
        cases = self.ledger.cases(design_id=baseline_id)
        vectors = self._vectors(cases)
        self._baseline = (baseline_id, vectors)
        if vectors is None and self.goal.uses_baseline() and all(c.state in ("done", "failed") for c in cases):
            failed = [c for c in cases if c.state == "failed"]
            if self.ledger.design(baseline_id).status == "pending":
                self.ledger.finish_design(baseline_id, status="failed")
            first = failed[0]
            self.stop_reason = (f"the baseline design failed (case {first.name}: {first.failure_reason}); the goal "
                                "compares designs with the baseline, so the campaign stops; fix the solver set-up and run again")
            return _BASELINE_FAILED
        return vectors

    def _actual_outputs(self, cases: list[CaseRow]) -> dict[str, float | None]:
        """What the solver returned for each quantity at each condition, labelled as composite predictions are."""
        labels = Composition(self.goal, tuple(self.config.quantities), tuple(self.conditions), None, ()).label
        return {labels(q, c.condition_index): (c.quantities or {}).get(q) if c.state == "done" else None
                for c in cases for q in self.config.quantities}

    def _vectors(self, cases: list[CaseRow]) -> dict[str, Any] | None:
        if not cases or any(c.state != "done" for c in cases):
            return None
        ordered = sorted(cases, key=lambda c: c.condition_index)
        return {q: np.array([c.quantities[q] for c in ordered]) for q in self.config.quantities}  # type: ignore[index]


_BASELINE_FAILED = object()


def _at_most(history: History, n: int, seed: int) -> History:
    """The history restricted to ``n`` of its finished designs (a seeded random subset), if it has more."""
    if len(history.X) <= n:
        return history
    keep = np.sort(np.random.default_rng(seed).choice(len(history.X), size=n, replace=False))
    return replace(history, X=history.X[keep], objective=history.objective[keep], margins=history.margins[keep],
                   succeeded=history.succeeded[keep])


@flow(name="campaign", log_prints=True)
def campaign_flow(campaign_dir: str, cancel_jobs: bool = False) -> State:
    """Run a campaign's designs through its solver until its plan is done.

    ``cancel_jobs``: on an interrupt, cancel batch jobs too instead of leaving them running
    for the next run to re-attach.
    """
    directory = Path(campaign_dir)
    try:
        config, base_dir = campaign_folder.load(directory)
        adapter = build_adapter(config.solver, config.quantities, base_dir)
        with Ledger.open(ledger_path(directory)) as ledger:
            conductor = _Conductor(directory, config, ledger, adapter, stop=_Stop(cancel_detached=cancel_jobs))
            conductor.plan()
            conductor.run()
            counts = ledger.count_cases()
    except SortieError as err:
        # A campaign that stops for a reason the user can act on is a failed run with a message,
        # not a crash: no traceback, and the reason travels back to the caller in the state.
        return Failed(message=str(err), data={"error": str(err)})
    except (KeyboardInterrupt, TerminationSignal) as exc:
        # Ctrl-C or SIGTERM is the user's decision, not a crash: the conductor has already put its
        # cases back or left batch jobs for the next run; the flow ends Cancelled (Prefect logs no
        # "Crash detected!" error) and run_campaign raises the interrupt again for the caller.
        by_term = isinstance(exc, (Terminated, TerminationSignal))
        return Cancelled(message="stopped by SIGTERM" if by_term else "stopped by Ctrl-C",
                         data={"interrupted": "SIGTERM" if by_term else "SIGINT"})
    return Completed(data={"cases_done": counts["done"], "cases_failed": counts["failed"]})


def run_campaign(directory: Path, *, cancel_jobs: bool = False) -> dict[str, int]:
    """Run the campaign in ``directory`` (prepared by :func:`sortie.campaign.prepare`) to its end.

    Raises
    ------
    CampaignError
        When the campaign stops before its plan is done; the message says why.
    KeyboardInterrupt
        On Ctrl-C; :class:`~sortie.runstate.Terminated` (a KeyboardInterrupt) on SIGTERM.
    """
    config, _ = campaign_folder.load(directory)  # the flow builds (and so checks) the adapter once
    # Routine GP ConvergenceWarnings (a length-scale at its bound) are kept in each surrogate's
    # warnings_; the surrogates catch them with catch_warnings, which is not thread-safe, so with
    # case threads running a few could slip through to the terminal. Silence that category here.
    warnings.filterwarnings("ignore", category=ConvergenceWarning)
    runner = ThreadPoolTaskRunner(max_workers=config.slots)
    try:
        with temporary_settings(updates={PREFECT_FLOWS_HEARTBEAT_FREQUENCY: None}):
            state = campaign_flow.with_options(task_runner=runner, flow_run_name=config.campaign.name)(
                str(directory), cancel_jobs, return_state=True)
    except TerminationSignal:  # SIGTERM while Prefect's engine, not the flow, was running
        raise Terminated() from None
    result = state.result(raise_on_failure=False)
    if state.is_cancelled():
        raise Terminated() if isinstance(result, dict) and result.get("interrupted") == "SIGTERM" else KeyboardInterrupt()
    if state.is_failed():
        message = result.get("error") if isinstance(result, dict) else state.message
        raise CampaignError(str(message or "the campaign flow failed"))
    return result
