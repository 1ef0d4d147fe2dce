# The study's index of every statistical map, with its lineage hash. It only reads the
# maps' sidecars, so on a cluster it runs on the submitting machine (no cluster job).
localrules:
    index,


rule index:
    input:
        maps=indexed_maps(),
    output:
        index=f"{OUT}/index.tsv",
        description=f"{OUT}/dataset_description.json",
    log:
        f"{LOG_DIR}/index.log",
    script:
        "../scripts/index.py"
