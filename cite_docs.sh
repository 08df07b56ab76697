#!/usr/bin/env bash
# Rewrite citations of the working notes outside the repository into citations of docs/:
#   "METHODS §n"  -> "docs/methods.md §n"
#   "METHODS.md"  -> "docs/methods.md"
#   "DESIGN.md"   -> docs/bundle.md where the bundle is meant, docs/methods.md where the
#                    conventions are meant, docs/README.md where the layout/flow is meant.
# Only .py files under domains/ and napari_plugin/ are edited (tests/ too with --with-tests), and only
# those that hold a citation.
# Names that merely contain the word (LINE_METHODS) are left alone.
#
# Usage: ./cite_docs.sh [ROOT]      ROOT defaults to the folder of this script (the repository).
#        ./cite_docs.sh --check [ROOT]   report what would change, change nothing (exit 1 if anything would).
#        ./cite_docs.sh --with-tests [ROOT]   also tests/, examples/ and benchmarks/ (off by default).
# Exit status: 0 when no outside citation is left, 1 otherwise.
set -euo pipefail

check=0
wanted=(domains napari_plugin)
while [[ "${1:-}" == --* ]]; do
    case "$1" in
        --check) check=1 ;;
        --with-tests) wanted+=(tests examples benchmarks) ;;
        *) echo "cite_docs.sh: unknown option $1 (expected --check, --with-tests)" >&2; exit 2 ;;
    esac
    shift
done
root="${1:-$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)}"
cd "$root"

dirs=()
for d in "${wanted[@]}"; do [[ -d "$d" ]] && dirs+=("$d"); done
if [[ ${#dirs[@]} -eq 0 ]]; then
    echo "cite_docs.sh: no domains/ or napari_plugin/ folder under $root" >&2
    exit 2
fi

# A citation: METHODS followed by " §" or ".md" and not preceded by a word character; DESIGN.md likewise.
pattern='(^|[^A-Za-z0-9_])(METHODS( §|\.md)|DESIGN\.md)'

mapfile -t files < <(grep -rlE --include='*.py' "$pattern" "${dirs[@]}" | sort || true)

if [[ $check -eq 1 ]]; then
    if [[ ${#files[@]} -eq 0 ]]; then echo "no outside citations"; exit 0; fi
    grep -nE "$pattern" "${files[@]}"
    exit 1
fi

sed_program=(
    # Paths that pointed at the notes' own folder.
    -e 's#\(\.\./\)\{0,1\}\(shared/\)\{0,1\}METHODS\.md#docs/methods.md#g'
    -e 's#\(\.\./\)\{0,1\}\(shared/\)\{0,1\}DESIGN\.md#DESIGN.md#g'
    # "(docs: METHODS §8)" -> "(docs/methods.md §8)"
    -e 's#docs: METHODS §#docs/methods.md §#g'
    -e 's#\(^\|[^A-Za-z0-9_/]\)METHODS §#\1docs/methods.md §#g'
    # DESIGN.md by meaning.
    -e 's#(DESIGN\.md, Conventions)#(docs/methods.md, Conventions)#g'
    -e 's#follow DESIGN\.md:#follow docs/methods.md (Conventions):#g'
    -e '/[Cc]onvention\|coordinates\|units\|axes/s#\(^\|[^A-Za-z0-9_/]\)DESIGN\.md#\1docs/methods.md#g'
    -e '/bundle\|summary\.json\|\.csv\|zarr\|provenance/s#\(^\|[^A-Za-z0-9_/]\)DESIGN\.md#\1docs/bundle.md#g'
    -e 's#\(^\|[^A-Za-z0-9_/]\)DESIGN\.md#\1docs/README.md#g'
)

for f in "${files[@]}"; do
    sed -i "${sed_program[@]}" "$f"
    echo "rewrote citations in $f"
done

left=$(grep -rnE --include='*.py' "$pattern" "${dirs[@]}" || true)
if [[ -n "$left" ]]; then
    echo "cite_docs.sh: citations left that no rule rewrote:" >&2
    echo "$left" >&2
    exit 1
fi
echo "no outside citations left in ${dirs[*]}"
