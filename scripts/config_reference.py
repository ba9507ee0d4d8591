"""Print the config reference (every key, its default and description) as a Markdown table.

The README's reference section is this script's output; tests/test_readme.py checks they agree.
"""

from harness.config import field_docs


def reference() -> str:
    rows = ["| key | default | meaning |", "|---|---|---|"]
    for key, default, doc in field_docs():
        rows.append(f"| `{key}` | `{default}` | {doc.replace('|', '/')} |")
    return "\n".join(rows) + "\n"


if __name__ == "__main__":
    print(reference(), end="")
