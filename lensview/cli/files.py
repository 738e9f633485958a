"""``session`` (a saved session against its files) and ``demo`` (the demo scenario)."""

from pathlib import Path


from ..errors import LensviewInputError

def cmd_session(args):
    from ..io import check_session_files, load_session

    session = load_session(args.session)
    supplied = {Path(p).name: p for p in args.files}
    statuses = check_session_files(session, supplied)
    for status in statuses:
        print(str(status))
    print(f"{len(session.candidates)} knot(s); z_lens = {session.z_lens}, "
          f"z_source = {session.z_source}")
    if args.candidates_out:
        from ..io import write_table

        write_table(session.candidate_table(), args.candidates_out)
        print(f"wrote the knots to {args.candidates_out}")
    bad = [s for s in statuses if not s.ok]
    if bad:
        raise LensviewInputError(
            f"{len(bad)} input file(s) are missing or differ from the session; supply the "
            "files the session was made with (see the lines above).")


def cmd_demo(args):
    from ..demo import generate_demo

    written = generate_demo(args.directory, seed=args.seed)
    print(f"wrote the demo scenario to {args.directory}"
          + (f" ({len(written)} files)" if written else ""))


