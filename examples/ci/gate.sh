#!/usr/bin/env bash
# A CI step that pushes a candidate model, gates it against what a tag
# serves now, keeps the HTML report as a build artifact, and acts on the
# gate's exit code. Every modelgate call uses --json: stdout is one JSON
# document (schemas/output-<command>.schema.json), stderr JSON Lines.
#
# Inputs (environment):
#   MODELGATE        the modelgate binary (default: modelgate on PATH)
#   MODELGATE_STORE  the store (a directory, oci://HOST/PREFIX, gs://BUCKET/PREFIX)
#   CANDIDATE_DIR    the model directory the training job wrote
#   CANDIDATE        NAME:TAG to push it as (e.g. promo-scorer:build-1234)
#   TARGET           the tag it asks to go to (e.g. promo-scorer:prod)
#   POLICY           the policy file
#   MODELGATE_CI_KEY CI's report-signing private key, the PEM text itself (a
#                    CI secret exposed as an environment variable: nothing is
#                    written to disk)
#   SIGN_KEY         where that key is instead (default env:MODELGATE_CI_KEY):
#                    env:VAR, file:PATH (a file the secret store mounts)
#   OUT              where to keep push.json, gate.json, report.html (default: ./modelgate-out)
#
# Exit: 0 gate passed; 1 gate failed (report kept); the gate's own code
# (2 bad input, 3 conflict, 4 not authorised, 5 integrity, 70 internal)
# when it could not decide.
set -u
mg=${MODELGATE:-modelgate}
out=${OUT:-modelgate-out}
sign_key=${SIGN_KEY:-env:MODELGATE_CI_KEY}
for v in MODELGATE_STORE CANDIDATE_DIR CANDIDATE TARGET POLICY; do
  if [[ -z "${!v:-}" ]]; then
    echo "ci: $v is not set" >&2
    exit 2
  fi
done
if [[ $sign_key == env:* ]]; then
  var=${sign_key#env:}
  if [[ -z "${!var:-}" ]]; then
    echo "ci: $var is not set (CI's signing key, or set SIGN_KEY=file:PATH)" >&2
    exit 2
  fi
fi
mkdir -p "$out"

# 1. Push. The digest pins the candidate: the gate, the report and any later
# approval are about these bytes, whatever the tag does meanwhile.
"$mg" push --json "$CANDIDATE_DIR" "$CANDIDATE" >"$out/push.json" 2>"$out/push.log"
code=$?
if ((code != 0)); then
  echo "ci: push failed (exit $code):" >&2
  cat "$out/push.json" >&2
  exit "$code"
fi
digest=$(sed -n 's/^  "digest": "\(sha256:[0-9a-f]\{64\}\)",\{0,1\}$/\1/p' "$out/push.json" | head -n 1)
if [[ -z "$digest" ]]; then
  echo "ci: no digest in push.json" >&2
  exit 70
fi
name=${CANDIDATE%%:*}
echo "ci: pushed $CANDIDATE as $name@$digest"

# 2. Gate, signing the report with CI's key (read from the environment by
# modelgate itself), keeping the HTML page.
"$mg" gate --json "$name@$digest" --to "$TARGET" --policy "$POLICY" \
  --sign-key "$sign_key" --html "$out/report.html" >"$out/gate.json" 2>"$out/gate.log"
code=$?

# 3. Act on the exit code.
case $code in
0)
  echo "ci: gate passed for $TARGET; report: $out/report.html"
  echo "ci: next: two approvers run 'modelgate approve $name@$digest --to $TARGET ...', then 'modelgate promote'"
  ;;
1)
  echo "ci: gate FAILED for $TARGET; the report says why: $out/report.html" >&2
  ;;
*)
  echo "ci: the gate could not decide (exit $code):" >&2
  sed -n 's/^    "message": \(.*\)$/  \1/p' "$out/gate.json" >&2
  ;;
esac
exit "$code"
