"""Helpers for the shell's tests: a small made-up campaign, and ways to type lines into a shell.

The campaign (3 treatments x 6 blocks x 2 instances x 2 seeds) is loaded through the real
`blockyard load` path by the `loaded` fixture (conftest.py); what the shell prints is compared with
what the command line prints.
"""
from __future__ import annotations

import io
import json

from prompt_toolkit.document import Document
from prompt_toolkit.input import create_pipe_input
from prompt_toolkit.output import DummyOutput

from warehouse.commands.session import Session
from warehouse.front.cli import commands
from warehouse.front.shell.loop import Shell, run_shell

REGISTRY = commands()  # the command line's table, which the shell gets from it

TREATMENTS = [("stacker", "1.4", 0.0), ("stacker", "1.5", -1.5), ("packer", "2.0", 0.8)]
FAMILIES = {"fam-a": ["g1", "g2", "g3"], "fam-b": ["g1", "g2", "g3"]}
LAYOUT = '[metrics.pallets]\nsense = "min"\nunit = "pallets"\n[metrics.fill_pct]\nsense = "max"\nunit = "%"\n'


def write_campaign(path, treatments=TREATMENTS, host="rack-a"):
    lines = ["solver,version,family,group,instance,seed,status,host,pallets,fill_pct"]
    k = 0
    for b, (fam, groups) in enumerate(FAMILIES.items()):
        for g_i, g in enumerate(groups):
            for inst in (1, 2):
                for seed in (1, 2):
                    for t_i, (name, version, shift) in enumerate(treatments):
                        k += 1
                        noise = ((k * 7919) % 13) / 13.0 - 0.5
                        pallets = 30 + 4 * b + 2 * g_i + inst + shift + noise
                        status = "timeout" if (name, version, fam, g, inst, seed) == ("packer", "2.0", "fam-b", "g3", 2, 2) else "ok"
                        value = "" if status != "ok" else f"{pallets:.3f}"
                        lines.append(f"{name},{version},{fam},{g},{fam}-{g}-{inst},{seed},{status},{host},{value},"
                                     f"{80 - shift + noise:.2f}")
    path.write_text("\n".join(lines) + "\n")
    return path


def drive(location, lines, close=False, table=None):
    """Type the lines into a shell on the warehouse; return (everything printed, the shell)."""
    out = io.StringIO()
    session = Session(location=location, commands=table or commands())
    try:
        with create_pipe_input() as inp:
            inp.send_text("".join(line + "\n" for line in lines))
            if close:
                inp.close()
            elif not lines or lines[-1] not in ("exit", "quit"):
                inp.send_text("exit\n")
            shell = run_shell(session, input=inp, output=DummyOutput(), out=out)
    finally:
        session.close()
    return out.getvalue(), shell


def documents(text):
    """The JSON documents in the shell's output, in order."""
    dec, docs, i = json.JSONDecoder(), [], 0
    while True:
        i = text.find("\n{", i)
        if i < 0:
            return docs
        doc, end = dec.raw_decode(text, i + 1)
        docs.append(doc)
        i = end


def without_ids(doc):
    return {k: v for k, v in doc.items() if k != "analysis_id"}


def shell_on(location, out=None):
    sh = Shell(Session(location=location), out=out or io.StringIO())
    sh.start(background=False)
    return sh


def completions(sh, text):
    doc = Document(text, len(text))
    return [c.text for c in sh.completer.get_completions(doc, None)]
