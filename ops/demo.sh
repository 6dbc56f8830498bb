#!/usr/bin/env bash
# The main job on sample_corpus/, end to end, in a scratch folder (.demo/, git-ignored):
# sync, search with citations, then an edit, a deletion and a rename, each followed by a sync
# that shows how much was embedded and how much reused. sample_corpus/ itself is never changed.
set -euo pipefail
cd "$(dirname "$0")/.."
BIN=${BIN:-.venv/bin}
UPWELL="$BIN/upwell"
SHARE=.demo/marrowby-share
export UPWELL_INDEX=.demo/index

run() { printf '\n$ upwell'; printf ' %q' "$@"; printf '\n'; "$UPWELL" "$@"; }
say() { printf '\n### %s\n' "$*"; }

rm -rf .demo && mkdir -p .demo && cp -r sample_corpus "$SHARE"

say "1. First sync of the Marrowby Cycle Works share: everything is extracted, chunked, embedded"
run sync "$SHARE"

say "2. Searches, each answered with a citation (file, page, heading or time range)"
run search "torque for the crank bolts" -k 2
run search "how do I return a damaged frame" -k 2
run search "spoke tension when truing a wheel" -k 2
run search "what changed in the brake hose routing" -k 1
run search "which oil goes in the HB2 brake" -k 1
run search "price of HB2 brake pads" -k 1
run search "stem faceplate bolt torque on the new card" -k 1
run search "when may frames be sprayed in booth 2" -k 1

say "3. Nothing changed: the second sync reads no file and embeds nothing"
run sync "$SHARE"

say "4. Edit one step of the wheel truing procedure (Word), then sync: only its chunks are embedded"
"$BIN/python" - "$SHARE/procedures/wheel-truing-and-tensioning.docx" <<'PY'
import sys, docx
path = sys.argv[1]
doc = docx.Document(path)
step = next(p for p in doc.paragraphs if p.text.startswith("At a low spot"))
step.text = ("At a low spot, loosen the pair of spokes at its centre by the same amount, "
             "never more than half a turn at once, and re-check the high spots next to it.")
doc.save(path)
print(f"edited: {path}")
PY
run sync "$SHARE"
run search "how far may I loosen spokes at a low spot" -k 1

say "5. Delete a change notice and rename a policy, then sync: a removal and a move, nothing embedded"
rm "$SHARE/notices/ECN-0152.txt"
mv "$SHARE/policies/returns-policy.md" "$SHARE/policies/returns-and-refunds.md"
run sync "$SHARE"
run search "how do I return a damaged frame" -k 1

say "6. Status: totals, sources, failures and the last commit"
run status
