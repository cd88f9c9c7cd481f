"""The local run's onstart hook drops Snakemake's job-rate limiter (workflow/rules/common.smk; docs/speed.md).

The hook assigns ``workflow.scheduler.job_rate_limiter = None``. That is
only right while Snakemake's scheduler (a) reads the limiter from that
attribute when it selects jobs and when it arms its re-evaluation timer and
(b) accepts None there (its own value when the limit is not set). These
tests read the installed Snakemake's scheduler, so an upgrade that renames
or reworks the limiter fails here instead of leaving the hook a silent no-op.
"""

import inspect

from snakemake.scheduling.job_scheduler import JobScheduler


def test_the_scheduler_arms_its_timer_and_limits_jobs_through_job_rate_limiter():
    schedule = inspect.getsource(JobScheduler.schedule)
    assert "if self.job_rate_limiter is not None:" in schedule and "self._schedule_reevalutation(self.job_rate_limiter.timespan)" in schedule
    selector = inspect.getsource(JobScheduler.job_selector)
    assert "if self.job_rate_limiter is None:" in selector


def test_the_scheduler_sets_job_rate_limiter_to_none_itself_when_no_limit_is_given():
    constructor = inspect.getsource(JobScheduler.__init__)
    assert "self.job_rate_limiter = (" in constructor and "else None" in constructor

