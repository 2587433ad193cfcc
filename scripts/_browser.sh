# Sourced by scripts/test: Debian's chromium and its chromedriver for the report-page test, installed when
# missing and the machine allows it (root with apt-get). Without them that one test skips, unless
# EQUITHETA_REQUIRE_BROWSER=1 (set by .ci/run), which makes it fail.
if ! command -v chromium >/dev/null 2>&1 || ! command -v chromedriver >/dev/null 2>&1; then
  if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
    echo "installing Debian's chromium and chromedriver for the report-page test (first run only) ..." >&2
    if ! { apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium chromium-driver; } \
        >/dev/null 2>&1; then
      echo "could not install chromium: the report-page browser test will skip" >&2
    fi
  fi
fi
