# The study's index of every statistical map, with its lineage hash.
rule index:
    input:
        maps=indexed_maps(),
    output:
        index=OUT + "/index.tsv",
    log:
        LOG_DIR + "/index.log",
    script:
        "../scripts/index.py"
