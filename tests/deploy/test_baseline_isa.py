"""Every Foray binary runs on any x86-64 CPU: outside the model's dispatched kernels (Highway's
per-target namespaces N_SSSE3, N_SSE4, N_AVX2, N_AVX3, N_AVX3_DL, entered only after the CPU is
asked what it has) the machine code uses nothing beyond the x86-64 baseline (SSE2).

The disassembly (binutils' objdump, AT&T syntax) of each binary's .text is read function by
function; an instruction counts as beyond the baseline when it is VEX or EVEX encoded (AVX and
later: its mnemonic starts with "v" or it names a ymm, zmm or mask register) or is one of the
SSE3, SSSE3, SSE4.1, SSE4.2, POPCNT, LZCNT, BMI1/2, MOVBE or ADX instructions listed below (the
instruction set references of the Intel SDM, vol. 2, and AMD's APM, vol. 4 and 3). TZCNT is not
listed: it is encoded as REP BSF, which every x86-64 CPU runs (as BSF), and compilers emit it on
purpose for baseline code."""

import os
import platform
import re
import shutil
import subprocess

import pytest

BEYOND_BASELINE = set("""
lddqu movddup movshdup movsldup addsubps addsubpd haddps haddpd hsubps hsubpd fisttp fisttps fisttpl fisttpll
pabsb pabsw pabsd palignr phaddw phaddd phaddsw phsubw phsubd phsubsw pmaddubsw pmulhrsw pshufb psignb psignw psignd
blendpd blendps blendvpd blendvps dppd dpps extractps insertps movntdqa mpsadbw packusdw pblendvb pblendw
pcmpeqq pextrb pextrd pextrq pinsrb pinsrd pinsrq pmaxsb pmaxsd pmaxud pmaxuw pminsb pminsd pminud pminuw
pmovsxbw pmovsxbd pmovsxbq pmovsxwd pmovsxwq pmovsxdq pmovzxbw pmovzxbd pmovzxbq pmovzxwd pmovzxwq pmovzxdq
pmuldq pmulld ptest roundpd roundps roundsd roundss phminposuw
pcmpestri pcmpestrm pcmpistri pcmpistrm pcmpgtq crc32 crc32b crc32w crc32l crc32q
popcnt lzcnt andn bextr blsi blsmsk blsr bzhi pdep pext rorx sarx shlx shrx mulx adcx adox movbe
""".split())
DISPATCHED = re.compile(r"::N_(SSSE3|SSE4|AVX2|AVX3|AVX3_DL|AVX3_ZEN4)::")
PREFIXES = {"lock", "rep", "repz", "repnz", "repe", "repne", "notrack", "bnd", "data16", "addr32", "cs", "ds"}
WIDE_REGISTER = re.compile(r"%(ymm|zmm)\d+|%k[0-7]\b")


def beyond_baseline(binary):
    """(function, instruction) pairs outside dispatched code that need more than SSE2."""
    text = subprocess.run(["objdump", "-d", "-C", "--no-show-raw-insn", "-j", ".text", binary],
                          capture_output=True, text=True, check=True).stdout
    found, function = [], None
    for line in text.splitlines():
        header = re.match(r"^[0-9a-f]+ <(.*)>:$", line)
        if header:
            function = header.group(1)
            continue
        parts = line.split("\t")
        if len(parts) < 2 or function is None or DISPATCHED.search(function):
            continue
        words = parts[1].split()
        while words and words[0] in PREFIXES:
            words = words[1:]
        if not words:
            continue
        mnemonic = words[0]
        if mnemonic.startswith("v") or WIDE_REGISTER.search(parts[1]) or mnemonic in BEYOND_BASELINE:
            found.append((function, parts[1].strip()))
    return found


BINARIES = [name for name in ("FORAYD", "FORAY_CLI", "FORAY_SIM") if os.environ.get(name)]


@pytest.mark.skipif(platform.machine() != "x86_64", reason="the x86-64 baseline")
@pytest.mark.skipif(shutil.which("objdump") is None, reason="needs binutils' objdump")
@pytest.mark.parametrize("name", BINARIES)
def test_no_instruction_beyond_the_baseline_outside_dispatched_kernels(name):
    found = beyond_baseline(os.environ[name])
    shown = "\n".join(f"  {f}: {i}" for f, i in found[:20])
    assert not found, f"{len(found)} instructions beyond SSE2 outside dispatched code in {name}:\n{shown}"


@pytest.mark.skipif(platform.machine() != "x86_64", reason="x86-64 targets")
def test_the_check_sees_dispatched_kernels_and_would_flag_them():
    """The scan is not vacuous: forayd holds AVX2 and AVX-512 kernels (Highway's namespaces), and
    counted as undispatched they would be flagged."""
    text = subprocess.run(["objdump", "-d", "-C", "--no-show-raw-insn", "-j", ".text", os.environ["FORAYD"]],
                          capture_output=True, text=True, check=True).stdout
    assert "::N_AVX2::" in text and "::N_AVX3::" in text
    assert re.search(r"\tvfmadd\S*\s+%zmm", text), "no AVX-512 FMA in the dispatched kernels"


@pytest.mark.skipif(platform.machine() != "x86_64", reason="x86-64 targets")
@pytest.mark.skipif(shutil.which("g++") is None, reason="needs g++")
def test_the_check_flags_a_program_built_for_a_newer_cpu(tmp_path):
    """A loop built with -march=haswell (AVX2, FMA) is flagged; the same loop built for the
    baseline is not."""
    source = tmp_path / "axpy.cc"
    source.write_text("float a[4096], b[4096];\n"
                      "int main(int argc, char**) { for (int i = 0; i < 4096; ++i) a[i] += argc * b[i] * a[i];"
                      " return a[7] > 1; }\n")
    for flags, expect_flagged in ((["-march=haswell"], True), ([], False)):
        binary = tmp_path / ("newer" if flags else "baseline")
        subprocess.run(["g++", "-O3", *flags, str(source), "-o", str(binary)], check=True)
        assert bool(beyond_baseline(str(binary))) == expect_flagged, flags
