// A tiny JDBC client for hushql's client tests (tests/test_clients.py compiles and runs it).
//
// Usage: java -cp <classes>:postgresql.jar HushqlClientCheck HOST PORT DATABASE USER PASSWORD
//
// It runs the checks every client runs (an aggregate query, a refused query, a query with a
// parameter, and the metadata calls desktop tools make) and prints one tab-separated line per
// fact, for the Python test to read. Exit status 0 unless something unexpected is thrown.

import java.sql.Connection;
import java.sql.DatabaseMetaData;
import java.sql.DriverManager;
import java.sql.PreparedStatement;
import java.sql.ResultSet;
import java.sql.ResultSetMetaData;
import java.sql.SQLException;
import java.sql.SQLWarning;
import java.sql.Statement;
import java.util.Properties;

public final class HushqlClientCheck {
    private static final String COUNT =
        "SELECT district, count(*) AS households FROM households GROUP BY district ORDER BY district";
    private static final String COUNT_ABOVE =
        "SELECT district, count(*) AS households FROM households WHERE occupants > ? "
        + "GROUP BY district ORDER BY district";

    private HushqlClientCheck() {
    }

    private static void say(String... fields) {
        System.out.println(String.join("\t", fields));
    }

    private static void printRows(String label, ResultSet rs) throws SQLException {
        ResultSetMetaData meta = rs.getMetaData();
        for (int i = 1; i <= meta.getColumnCount(); i++) {
            say(label + "-column", meta.getColumnLabel(i), meta.getColumnTypeName(i));
        }
        while (rs.next()) {
            say(label + "-row", rs.getString(1), Long.toString(rs.getLong(2)));
        }
    }

    private static void printWarnings(SQLWarning warning) {
        for (SQLWarning w = warning; w != null; w = w.getNextWarning()) {
            say("notice", w.getSQLState(), w.getMessage().replace('\n', ' '));
        }
    }

    public static void main(String[] args) throws Exception {
        String url = "jdbc:postgresql://" + args[0] + ":" + args[1] + "/" + args[2];
        Properties props = new Properties();
        props.setProperty("user", args[3]);
        props.setProperty("password", args[4]);
        props.setProperty("sslmode", "disable");
        try (Connection conn = DriverManager.getConnection(url, props)) {
            DatabaseMetaData md = conn.getMetaData();
            say("product", md.getDatabaseProductName(), md.getDatabaseProductVersion());

            try (Statement st = conn.createStatement(); ResultSet rs = st.executeQuery(COUNT)) {
                printRows("dp", rs);
                printWarnings(st.getWarnings());
            }

            try (Statement st = conn.createStatement()) {
                st.executeQuery("SELECT * FROM households");
                say("refused", "none");
            } catch (SQLException e) {
                say("refused", e.getSQLState());
            }

            try (PreparedStatement ps = conn.prepareStatement(COUNT_ABOVE)) {
                ps.setInt(1, 2);
                try (ResultSet rs = ps.executeQuery()) {
                    printRows("param", rs);
                }
            }

            try (ResultSet rs = md.getTables(null, "public", "%", new String[] {"TABLE"})) {
                while (rs.next()) {
                    say("table", rs.getString("TABLE_NAME"), String.valueOf(rs.getString("REMARKS")));
                }
            }
            try (ResultSet rs = md.getColumns(null, "public", "households", "%")) {
                while (rs.next()) {
                    say("column", rs.getString("COLUMN_NAME"), rs.getString("TYPE_NAME"),
                        Integer.toString(rs.getInt("DATA_TYPE")),
                        String.valueOf(rs.getString("REMARKS")).replace('\n', ' '));
                }
            }
            try (ResultSet rs = md.getImportedKeys(null, "public", "readings")) {
                int keys = 0;
                while (rs.next()) {
                    keys++;
                }
                say("imported-keys", Integer.toString(keys));
            }
            try (ResultSet rs = md.getExportedKeys(null, "public", "households")) {
                int keys = 0;
                while (rs.next()) {
                    keys++;
                }
                say("exported-keys", Integer.toString(keys));
            }

            // The accuracy as columns, for tools that show result sets but not warnings; and
            // the same question again, answered from the stored answer.
            try (Statement st = conn.createStatement()) {
                st.execute("SET hushql.accuracy_columns = on");
                try (ResultSet rs = st.executeQuery(COUNT)) {
                    ResultSetMetaData meta = rs.getMetaData();
                    for (int i = 1; i <= meta.getColumnCount(); i++) {
                        say("margin-column", meta.getColumnLabel(i), meta.getColumnTypeName(i));
                    }
                    while (rs.next()) {
                        say("margin-row", rs.getString(1), Long.toString(rs.getLong(2)),
                            Double.toString(rs.getDouble(3)));
                    }
                    printWarnings(st.getWarnings());
                }
                st.execute("SET hushql.accuracy_columns = off");
            }
            try (ResultSet rs = md.getPrimaryKeys(null, "public", "households")) {
                int keys = 0;
                while (rs.next()) {
                    keys++;
                }
                say("primary-keys", Integer.toString(keys));
            }
            try (Statement st = conn.createStatement();
                 ResultSet rs = st.executeQuery("SELECT pg_catalog.pg_database_size(current_database())")) {
                say("size", "answered");
            } catch (SQLException e) {
                say("size", e.getSQLState());
            }
        }
    }
}
