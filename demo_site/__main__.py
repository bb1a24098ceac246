"""``python -m collector.demo_site serve [--port N]`` and
``python -m collector.demo_site generate DIR``."""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from collector.demo_site.generate import ensure_content, generate
from collector.demo_site.hosts import HOST_ROLES
from collector.demo_site.server import DEMO_OPTIONS, DemoServer


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m collector.demo_site",
                                     description="Fictional Fernhollow archive on loopback.")
    sub = parser.add_subparsers(dest="command", required=True)
    serve = sub.add_parser("serve", help="generate (once, cached) and serve the archive")
    serve.add_argument("--port", type=int, default=0, help="port for all hosts (0 = any)")
    serve.add_argument("--content", type=Path, default=None,
                       help="content folder (default: the user cache)")
    serve.add_argument("--log", type=Path, default=None, help="write a JSONL request log")
    gen = sub.add_parser("generate", help="write the archive into a folder")
    gen.add_argument("folder", type=Path)
    args = parser.parse_args(argv)

    if args.command == "generate":
        t0 = time.perf_counter()
        manifest = generate(args.folder)
        print(f"generated {len(manifest['items'])} items into {args.folder} "
              f"in {time.perf_counter() - t0:.1f} s; digest {manifest['digest'][:16]}")
        return 0
    content = args.content or ensure_content()
    if not (content / "manifest.json").exists():
        generate(content)
    server = DemoServer(content, port=args.port, log_path=args.log, **DEMO_OPTIONS).start()
    print(f"Fernhollow demo archive (content: {content})")
    for h, role in HOST_ROLES.items():
        print(f"  {server.base_url(h)}/  {role.split(':')[0]}")
    print("Press Ctrl-C to stop.")
    try:
        while True:
            time.sleep(3600)
    except KeyboardInterrupt:
        print("stopping")
    finally:
        server.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
