"""Timing of the zone-axis survey (not part of the CI run).

    python tests/benchmarks/bench_survey.py

Survey of all symmetry-distinct axes of Si at 200 kV, 6 mrad disk, for
--max-index 3, 5, 7 and 9, one process on one core, against a baseline
of predicting the same axes without the precision analysis.
"""


from laueline import predict, read_crystal
from laueline.survey import candidate_axes, survey
from timing import median_time  # noqa: E402



def main():
    si = read_crystal("Si")
    survey(si, max_index=2)  # warm
    print("max index   axes   survey s   predict-only s   ratio")
    for m in (3, 5, 7, 9):
        zones, _ = candidate_axes(si, m)
        repeat = 3 if m <= 7 else 1
        t_survey = median_time(lambda: survey(si, max_index=m), repeat)
        t_base = median_time(lambda: [predict(si, z, 200, 6) for z in zones], repeat)
        print(f"{m:9d} {len(zones):6d} {t_survey:10.2f} {t_base:16.2f} {t_survey / t_base:7.2f}")


if __name__ == "__main__":
    main()
