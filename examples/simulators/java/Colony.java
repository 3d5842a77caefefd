// A minimal external simulator for tessera in Java (no libraries).
//
// The same toy birth-death colony as ../python/colony.py. It follows the
// tessera contract (docs/simulators.md) through the environment instead of
// stdin, which avoids parsing JSON in Java:
//   * inputs:  TESSERA_PARAM_DIVISION_RATE, TESSERA_PARAM_DEATH_RATE,
//              TESSERA_PARAM_DURATION_H, TESSERA_PARAM_START_CELLS, TESSERA_SEED
//   * metrics: one JSON object written to the file named by TESSERA_METRICS.
//
// Run with Java 11 or later straight from the source file:
//   tessera simulate colony division_rate=0.05 \
//       --command colony='java /path/to/examples/simulators/java/Colony.java'
// (or compile once with `javac Colony.java` and use `java -cp /path/to/dir Colony`).

import java.io.IOException;
import java.nio.charset.StandardCharsets;
import java.nio.file.Files;
import java.nio.file.Path;
import java.util.Random;

public class Colony {
    static double input(String name, double fallback) {
        String v = System.getenv("TESSERA_PARAM_" + name);
        return v == null ? fallback : Double.parseDouble(v);
    }

    public static void main(String[] args) throws IOException {
        double division = input("DIVISION_RATE", 0.04);
        double death = input("DEATH_RATE", 0.01);
        double duration = input("DURATION_H", 48.0);
        int start = (int) input("START_CELLS", 10);
        String seedText = System.getenv("TESSERA_SEED");
        // Seeds are unsigned 64-bit numbers; parseUnsignedLong keeps all of them.
        long seed = seedText == null ? 0L : Long.parseUnsignedLong(seedText);
        if (division < 0 || death < 0 || duration < 0) {
            System.err.println("rates and duration must not be negative");
            System.exit(2);
        }

        Random rng = new Random(seed);
        int cells = start;
        double t = 0.0;
        while (cells > 0 && cells < 1_000_000) {
            double total = cells * (division + death);
            if (total == 0) break;
            t += -Math.log(1.0 - rng.nextDouble()) / total;
            if (t > duration) break;
            if (rng.nextDouble() * (division + death) < division) cells++; else cells--;
        }
        System.err.println("finished at " + cells + " cells");

        double growth = (cells > 0 && duration > 0) ? Math.log((double) cells / start) / duration : -1.0;
        String json = "{\"final_cells\": " + cells + ", \"net_growth_per_h\": " + growth + "}";
        String metricsFile = System.getenv("TESSERA_METRICS");
        if (metricsFile != null) {
            Files.write(Path.of(metricsFile), json.getBytes(StandardCharsets.UTF_8));
        } else {
            System.out.println(json);
        }
    }
}
