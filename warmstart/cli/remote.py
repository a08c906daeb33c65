"""The command line against a team service (``--server URL`` on the group,
or ``$WARMSTART_SERVER``; the token from ``$WARMSTART_TOKEN``).

Each command that can talk to a service asks :func:`server_client` first and,
when it gets a client, calls the helper here for its remote form. Data files
stay on this machine: profiles and fingerprints are computed here and sent.
"""

from __future__ import annotations

import json

import click

from warmstart.cli.common import print_json, print_table

__all__ = ["server_client", "show_study", "propose_leases", "print_remote_studies"]


def server_client(ctx: click.Context):
    """The :class:`~warmstart.client.Client` of ``--server``, or None (closed with the command)."""
    root = ctx.find_root()
    root.ensure_object(dict)
    url = root.obj.get("server")
    if not url:
        return None
    client = root.obj.get("client")
    if client is None:
        from warmstart.client import Client

        client = Client(url)
        root.obj["client"] = client
        root.call_on_close(client.close)
    return client


def print_remote_studies(client, learner, task, owner, tags: dict, as_json: bool) -> None:
    import pandas as pd  # here, not at the top: every command that may talk to a service imports this module

    frame = client.studies(learner=learner, task=task, owner=owner, tags=tags)
    cols = ["study_id", "task", "learner", "metric", "direction", "origin", "trial_count", "best_score", "owner",
            "tags", "created_at"]
    if frame.empty:
        print_table(pd.DataFrame(columns=cols), as_json, empty="no study matches (on the service)")
        return
    frame["created_at"] = [str(c)[:16].replace("T", " ") for c in frame["created_at"]]
    print_table(frame[cols], as_json)


def show_study(client, study: int, top: int, as_json: bool) -> None:
    row = client.study(study, top=top)
    if as_json:
        row["trials"] = client.trials(study).to_dict(orient="records")
        print_json(row)
        return
    click.echo(f"study {row['study_id']}: {row['learner']} on task {row['task']!r} ({row['origin']})")
    click.echo(f"  metric    {row['metric']} ({row['direction']})")
    click.echo(f"  trials    {row['trial_count']} ({row['trial_count'] - row['n_ok']} failed)")
    best = row["best_score"]
    click.echo(f"  best      {best:.4g}" if best is not None else "  best      -")
    if row["owner"]:
        click.echo(f"  owner     {row['owner']}")
    if row["tags"]:
        click.echo("  tags      " + ", ".join(f"{k}={v}" for k, v in row["tags"].items()))
    from warmstart.space import Space

    space = Space.from_dict(row["space"])
    click.echo("  space     " + "; ".join(f"{p.name}: {p.describe()}" for p in space))
    click.echo("")
    import pandas as pd

    trials = pd.DataFrame(row["best_trials"])
    cols = ["number"] + space.names + ["score", "cost_s"]
    print_table(trials[cols] if len(trials) else trials, empty="no successful trials")


def propose_leases(client, study: int, k: int, lease_seconds: float | None, as_json: bool) -> None:
    leases = client.propose(study, k=k, lease_seconds=lease_seconds)
    if as_json:
        print_json([{"trial": lease["trial"], "config": lease["config"]} for lease in leases])
        return
    click.echo(f"study {study}: {len(leases)} config(s) leased until {leases[0]['expires_at']}; record each with "
               "`warmstart record --study N --trial ID --score S`", err=True)
    for lease in leases:
        click.echo(f"trial {lease['trial']}  {json.dumps(lease['config'], sort_keys=True)}")
