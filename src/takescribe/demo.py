"""Moved to :mod:`takescribe.jobs.demo` in 0.2; this module re-exports its public names for one release."""

from .jobs.demo import (  # noqa: F401
    DEMO_STUDENTS,
    DRAFT_FILES,
    BUNDLE_FILES,
    CAUTION,
    DemoStudent,
    DemoResult,
    demo_bundle,
    load_scenario,
    run_demo,
    format_demo_summary,
)

__all__ = ['DEMO_STUDENTS', 'DRAFT_FILES', 'BUNDLE_FILES', 'CAUTION', 'DemoStudent', 'DemoResult', 'demo_bundle', 'load_scenario', 'run_demo', 'format_demo_summary']
