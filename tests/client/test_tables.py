"""The one-line diagnostics the client prints for a posterior."""

from honing.client.tables import diagnostics_line


def test_the_line_says_when_the_posterior_rests_on_fewer_runs_than_have_completed() -> None:
    summary = {"round": 4, "runs_completed": 54, "runs_fitted": 43, "status": "collecting"}
    assert "runs completed 54 (posterior from 43)" in diagnostics_line(summary)


def test_the_line_stays_short_when_the_counts_agree_or_a_server_predates_the_field() -> None:
    for summary in ({"runs_completed": 54, "runs_fitted": 54}, {"runs_completed": 54}):
        line = diagnostics_line(summary)
        assert "runs completed 54 |" in line and "posterior from" not in line
