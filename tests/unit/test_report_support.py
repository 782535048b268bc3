"""Hand-made audits for the report and render tests (invented loops; no test here)."""

from __future__ import annotations

from audit.pipeline import AuditOptions, build_models, evaluate_frequency, new_audit
from audit.policy import Policy
from audit.rows import Inventory, LoopRow, Problem

HOSTILE_TAG = "<script>alert(1)</script>"
HOSTILE_SERVICE = '=HYPERLINK("http://example.invalid/x","open")'
HOSTILE_AREA = "@SUM(A1) $x$ & <b>"


def rows() -> tuple[LoopRow, ...]:
    """Six invented loops: passing, too aggressive, unstable, marginal-ish, hostile text, invalid."""
    def row(i, **kw):
        base = dict(index=i, sheet="loops", excel_row=i + 2, model="fopdt", gain=1.0, tau1=10.0, dead_time=2.0,
                    form="ideal", kc=1.0, ti=10.0, td=0.0, area="North", criticality="medium",
                    raw={"tag": kw.get("tag"), "Kc": kw.get("kc", 1.0)})
        base.update(kw)
        return LoopRow(**base)

    return (
        row(0, tag="FC-100", service="feed flow", kc=1.0, ti=10.0),
        row(1, tag="TC-200", service="jacket temperature", kc=4.0, ti=4.0, area="South", criticality="high",
            band_rad_s=0.05, attenuation_db=20.0),
        row(2, tag="PC-300", service="header pressure", kc=12.0, ti=3.0, criticality="high"),
        row(3, tag="LC-400", service="drum level", model="ipdt", gain=0.05, tau1=None, dead_time=3.0,
            kc=2.0, ti=60.0, area="South", criticality="low"),
        row(4, tag=HOSTILE_TAG, service=HOSTILE_SERVICE, area=HOSTILE_AREA, kc=6.0, ti=5.0),
        row(5, tag="FC-101", service="bad row", model=None, gain=None,
            errors=(Problem("loops", "F7", "gain", "must be a number, found 'abc'"),)),
    )


def make_audit(out_dir, detail: str = "failing", pdf: bool = False, site: str = "Invented Works"):
    """An Audit of :func:`rows` evaluated by the frequency stage (no ranking, no proposals)."""
    inv = Inventory(path="loops.xlsx", name="loops.xlsx", sha256="ab" * 32, rows=rows(), policy=Policy())
    audit = new_audit(inv, AuditOptions(out_dir=str(out_dir), site=site, date="2024-05-01", detail=detail,
                                        pdf=pdf))
    build_models(audit)
    evaluate_frequency(audit)
    return audit
