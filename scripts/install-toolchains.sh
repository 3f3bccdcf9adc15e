#!/bin/sh
# Install what the target checks need (Debian/Ubuntu): host gcc, Arm and RISC-V bare-metal gcc with
# picolibc, the QEMU system emulators, cppcheck, valgrind and clang (its static analyzer runs on
# the generated code): the package set of docs/toolchains.md, without recommended packages; and
# what the tests of the build files and the review report use: cmake and make, and the chromium
# browser (headless). Idempotent: installs only what is missing, and exits non-zero if
# anything is still missing afterwards.
set -u

# "what to look for|packages that provide it"; a path is tested as a file, anything else as a command.
CHECKS="gcc|gcc
/usr/include/stdio.h|libc6-dev
arm-none-eabi-gcc|gcc-arm-none-eabi libnewlib-arm-none-eabi
/usr/lib/picolibc/arm-none-eabi/picolibc.specs|picolibc-arm-none-eabi
qemu-system-arm|qemu-system-arm
riscv64-unknown-elf-gcc|gcc-riscv64-unknown-elf
/usr/lib/picolibc/riscv64-unknown-elf/picolibc.specs|picolibc-riscv64-unknown-elf
qemu-system-riscv32|qemu-system-misc
cppcheck|cppcheck
valgrind|valgrind
clang|clang
timeout|coreutils
cmake|cmake
make|make
chromium|chromium"

present() {
    case "$1" in
        /*) [ -e "$1" ] ;;
        *) command -v "$1" >/dev/null 2>&1 ;;
    esac
}

missing_packages() {
    echo "$CHECKS" | while IFS='|' read -r what packages; do
        present "$what" || echo "$packages"
    done | tr ' ' '\n' | sort -u | tr '\n' ' '
}

missing=$(missing_packages)
if [ -z "$missing" ]; then
    echo "install-toolchains: everything is present, nothing to do"
    exit 0
fi
echo "install-toolchains: missing packages: $missing"
if [ "$(id -u)" -ne 0 ]; then
    echo "install-toolchains: not root; run: sudo apt-get install -y --no-install-recommends $missing" >&2
    exit 1
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "install-toolchains: no apt-get here; install the equivalents of: $missing" >&2
    exit 1
fi
echo "install-toolchains: apt-get update"
DEBIAN_FRONTEND=noninteractive apt-get update -qq || { echo "install-toolchains: apt-get update failed" >&2; exit 1; }
echo "install-toolchains: apt-get install $missing"
# shellcheck disable=SC2086  # word splitting of the package list is intended
DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends $missing >/dev/null \
    || { echo "install-toolchains: apt-get install failed" >&2; exit 1; }
still=$(missing_packages)
if [ -n "$still" ]; then
    echo "install-toolchains: still missing after install: $still" >&2
    exit 1
fi
echo "install-toolchains: done, every toolchain is present"
